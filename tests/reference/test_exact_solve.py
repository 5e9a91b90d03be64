"""The guaranteed error bound against the exact solution of the PageRank linear system.

Reference: scipy.sparse.linalg.spsolve (a general-purpose direct sparse solver, SuperLU) on

    (I - d P - d u a^T) r = (1 - d) v

with P[j, i] = w_ij / w_out(i) (column-stochastic except at dead ends), a the dead-end
indicator, v the teleport distribution and u = v (dead ends follow the teleport, "strongly
preferential") or u = 1/N ("weakly preferential"). This is the standard linear-system form of
PageRank (Langville & Meyer, "Google's PageRank and Beyond", 2006, ch. 7; from memory). The
direct solve is exact up to rounding (~1e-16 per entry here), so the L1 distance to it is the
true error of a run.

The helpers here are shared by the other reference tests.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

import shardrank
from shardrank import RankOptions

# ---- shared helpers ---------------------------------------------------------------------------


def node_ids(keys: np.ndarray, *cols: np.ndarray) -> list[np.ndarray]:
    """Store ids of integer keys: a store numbers its nodes 0..N-1 in key order."""
    return [np.searchsorted(keys, c) for c in cols]


def exact_pagerank(
    src: np.ndarray,
    dst: np.ndarray,
    weight: np.ndarray | None,
    n: int,
    damping: float,
    teleport: np.ndarray | None = None,
    dead_ends: str = "teleport",
) -> np.ndarray:
    """PageRank by a direct sparse solve (scipy); duplicates are merged by summing their weights.

    ``src``/``dst`` are ids 0..n-1; ``teleport`` float64[n] summing to 1 (None: uniform).
    """
    w = np.ones(len(src)) if weight is None else np.asarray(weight, dtype=np.float64)
    if weight is None:
        # an unweighted store keeps one edge per (src, dst) pair: collapse duplicates to weight 1
        pairs = np.unique(np.stack([src, dst], axis=1), axis=0)
        src, dst, w = pairs[:, 0], pairs[:, 1], np.ones(len(pairs))
    adj = sp.coo_matrix((w, (dst, src)), shape=(n, n)).tocsc()  # coo -> csc sums duplicates
    w_out = np.asarray(adj.sum(axis=0)).ravel()
    dead = w_out == 0
    p = adj @ sp.diags(np.where(dead, 0.0, 1.0 / np.where(dead, 1.0, w_out)))
    v = np.full(n, 1.0 / n) if teleport is None else np.asarray(teleport, dtype=np.float64)
    u = v if dead_ends == "teleport" else np.full(n, 1.0 / n)
    dead_cols = sp.csc_matrix(np.outer(u, dead.astype(np.float64)))
    m = sp.identity(n, format="csc") - damping * p - damping * dead_cols
    r = spla.spsolve(m.tocsc(), (1.0 - damping) * v)
    return np.asarray(r, dtype=np.float64)


def write_teleport(path: Path, keys: Sequence[Any], weights: Sequence[float]) -> Path:
    """A (key, weight) teleport table as a real Parquet file."""
    pq.write_table(pa.table({"key": list(keys), "weight": [float(x) for x in weights]}), path)
    return path


def dense_teleport(all_keys: np.ndarray, keys: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """The normalised teleport vector a table describes (weights of repeated keys add up)."""
    v = np.zeros(len(all_keys))
    np.add.at(v, np.searchsorted(all_keys, keys), weights)
    return v / v.sum()


# ---- the bound holds ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def weighted_graph(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A random weighted multigraph: dead ends, self-loops, duplicate edges; 9 blocks of 37 nodes;
    a teleport table on 25 keys (one repeated, so its weights add up)."""
    from tests.conftest import write_edges

    tmp = tmp_path_factory.mktemp("exact")
    rng = np.random.default_rng(20261202)
    n, m = 320, 900
    src, dst = rng.integers(0, n, m), rng.integers(0, n, m)
    src[:15] = dst[:15]  # self-loops
    src[15:30], dst[15:30] = src[30:45], dst[30:45]  # duplicate edges (weights summed by the build)
    w = rng.uniform(0.1, 3.0, m)
    f = write_edges(tmp / "edges.parquet", src.tolist(), dst.tolist(), w.tolist())
    store = tmp / "store"
    shardrank.build_store([f], store, shardrank.BuildOptions(weight="w", block_nodes=37))
    keys = np.unique(np.concatenate([src, dst]))
    t_keys = np.concatenate([rng.choice(keys, 24, replace=False), keys[:1]])
    t_w = rng.uniform(0.0, 2.0, t_keys.size)
    tele = write_teleport(tmp / "teleport.parquet", t_keys.tolist(), t_w.tolist())
    s_id, d_id = node_ids(keys, src, dst)
    v = dense_teleport(keys, t_keys, t_w)
    exact = {
        pol: exact_pagerank(s_id, d_id, w, keys.size, 0.85, v, pol)
        for pol in ("teleport", "uniform")
    }
    return {"store": store, "teleport": str(tele), "exact": exact, "n": keys.size, "tmp": tmp}


@pytest.mark.parametrize("dead_ends", ["teleport", "uniform"])
@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
@pytest.mark.parametrize("tol", [1e-6, 1e-9, 1e-12])
def test_l1_error_is_within_tol_and_within_the_recorded_bound(
    weighted_graph: dict[str, Any], tmp_path: Path, method: str, tol: float, dead_ends: str
) -> None:
    g = weighted_graph
    res = shardrank.rank(
        g["store"],
        tmp_path / "run",
        RankOptions(method=method, tol=tol, dead_ends=dead_ends, teleport=g["teleport"], threads=1),
    )
    true_err = float(np.abs(res.scores - g["exact"][dead_ends]).sum())
    assert res.converged
    # scipy direct solve: the promised bound holds ...
    assert true_err <= tol
    # ... and run.json's recorded bound is a true upper bound, not an estimate
    assert res.error_bound <= tol
    assert true_err <= res.error_bound


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_a_stopped_run_still_records_a_true_bound(
    weighted_graph: dict[str, Any], tmp_path: Path, method: str
) -> None:
    g = weighted_graph
    res = shardrank.rank(
        g["store"],
        tmp_path / "run",
        RankOptions(method=method, tol=1e-12, max_iter=6, teleport=g["teleport"], threads=1),
    )
    true_err = float(np.abs(res.scores - g["exact"]["teleport"]).sum())
    assert not res.converged and np.isfinite(res.error_bound)
    # scipy direct solve: the bound of a run cut short at --max-iter is still an upper bound
    assert true_err <= res.error_bound


def test_damping_099_reaches_the_exact_answer(tmp_path: Path) -> None:
    """The issue asks that damping up to 0.99 works (slow convergence: ~ log(tol) / log(0.99))."""
    from tests.conftest import write_edges

    rng = np.random.default_rng(99)
    n, m = 60, 200
    src, dst = rng.integers(0, n, m), rng.integers(0, n, m)
    f = write_edges(tmp_path / "e.parquet", src.tolist(), dst.tolist())
    store = tmp_path / "s"
    shardrank.build_store([f], store, shardrank.BuildOptions(block_nodes=16))
    keys = np.unique(np.concatenate([src, dst]))
    s_id, d_id = node_ids(keys, src, dst)
    ref = exact_pagerank(s_id, d_id, None, keys.size, 0.99)
    for method in ("power", "gauss-seidel"):
        res = shardrank.rank(
            store,
            tmp_path / method,
            RankOptions(damping=0.99, tol=1e-9, method=method, max_iter=5000, threads=1),
        )
        # scipy direct solve
        assert res.converged and float(np.abs(res.scores - ref).sum()) <= 1e-9
