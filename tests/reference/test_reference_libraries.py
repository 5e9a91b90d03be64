"""Agreement with two general-purpose graph libraries: networkx.pagerank and igraph's
Graph.personalized_pagerank (PRPACK).

The graphs are random multigraphs with dead ends (including isolated nodes added with
--nodes), self-loops and duplicate edges, unweighted or weighted, with a uniform or a
personalised teleport, under both dead-end policies, both methods and several block sizes.

How each library is told the same problem:

- duplicates: a store keeps one edge per (src, dst) pair, summing weights when weighted. The
  reference graphs are therefore simple digraphs with summed weights (networkx.DiGraph;
  igraph.Graph.simplify(combine_edges="sum")). Self-loops are kept as ordinary out-links.
- dead ends, policy "teleport" (strongly preferential): networkx.pagerank with dangling=None
  sends dangling mass along the personalization vector (networkx docs, "dangling" parameter);
  igraph >= 0.9 restarts a walk stuck in a sink along the reset vector (igraph PR #1640,
  "PageRank: the walk should be restarted consistently between the ARPACK and PRPACK
  methods").
- dead ends, policy "uniform" (weakly preferential): networkx dangling={every node: 1}. igraph
  has no such switch, so each dead end gets an edge to every node (itself included) of equal
  weight: that is the "stochasticity fix" S = H + a e^T / n of Langville & Meyer, "Google's
  PageRank and Beyond" (2006), ch. 4 (from memory), the very same Markov chain.
"""

from __future__ import annotations

import itertools
from pathlib import Path
from typing import Any

import igraph as ig
import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions, RankOptions
from tests.conftest import write_edges
from tests.reference.test_exact_solve import dense_teleport, write_teleport

DAMPING = 0.85
BLOCK_SIZES = (16, 50, 1000)  # ten blocks of 16 nodes, four of 50, and one block
ISOLATED = (10_001, 10_002, 10_003)  # keys given only with --nodes: dead ends with no in-links


def _graph(seed: int, weighted: bool) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    n, m = 150, 420  # sparse enough that ~1/15 of the nodes are dead ends
    src, dst = rng.integers(0, n, m), rng.integers(0, n, m)
    src[:10] = dst[:10]  # self-loops
    src[10:40], dst[10:40] = src[40:70], dst[40:70]  # duplicate edges
    w = rng.uniform(0.05, 4.0, m) if weighted else None
    keys = np.unique(np.concatenate([src, dst, np.array(ISOLATED)]))
    return {"src": src, "dst": dst, "w": w, "keys": keys}


@pytest.fixture(scope="module")
def stores(
    tmp_path_factory: pytest.TempPathFactory,
) -> dict[tuple[bool, int], tuple[Path, dict[str, Any]]]:
    """One store per (weighted, block size), built from real Parquet files with DuckDB."""
    tmp = tmp_path_factory.mktemp("libs")
    nodes = tmp / "nodes.parquet"
    pq.write_table(pa.table({"key": list(ISOLATED)}), nodes)
    out = {}
    for weighted in (False, True):
        g = _graph(11 if weighted else 12, weighted)
        f = write_edges(
            tmp / f"e{int(weighted)}" / "edges.parquet",
            g["src"].tolist(),
            g["dst"].tolist(),
            None if g["w"] is None else g["w"].tolist(),
        )
        for bn in BLOCK_SIZES:
            store = tmp / f"s{int(weighted)}-{bn}"
            shardrank.build_store(
                [f],
                store,
                BuildOptions(weight="w" if weighted else None, block_nodes=bn, nodes=[str(nodes)]),
            )
            out[(weighted, bn)] = (store, g)
    return out


def _teleport(tmp: Path, g: dict[str, Any], personalized: bool) -> tuple[str | None, np.ndarray]:
    keys = g["keys"]
    if not personalized:
        return None, np.full(keys.size, 1.0 / keys.size)
    rng = np.random.default_rng(5)
    # seeds include an isolated dead end and zero weights; the remaining nodes get nothing
    t_keys = np.concatenate([rng.choice(keys[:-3], 12, replace=False), [ISOLATED[0]]])
    t_w = np.concatenate([rng.uniform(0.0, 3.0, 11), [0.0, 0.5]])
    path = write_teleport(tmp / "teleport.parquet", t_keys.tolist(), t_w.tolist())
    return str(path), dense_teleport(keys, t_keys, t_w)


def _simple_edges(g: dict[str, Any]) -> dict[tuple[int, int], float]:
    """(src, dst) -> summed weight (1 per pair when unweighted), as the store keeps them."""
    edges: dict[tuple[int, int], float] = {}
    ws = g["w"] if g["w"] is not None else itertools.repeat(None)
    for s, d, w in zip(g["src"].tolist(), g["dst"].tolist(), ws, strict=False):
        edges[(s, d)] = 1.0 if w is None else edges.get((s, d), 0.0) + float(w)
    return edges


def networkx_ranks(g: dict[str, Any], v: np.ndarray, dead_ends: str) -> np.ndarray:
    keys = g["keys"].tolist()
    dg = nx.DiGraph()
    dg.add_nodes_from(keys)
    dg.add_weighted_edges_from((s, d, w) for (s, d), w in _simple_edges(g).items())
    pers = dict(zip(keys, v.tolist(), strict=True))
    dangling = None if dead_ends == "teleport" else dict.fromkeys(keys, 1.0)
    # networkx stops when the L1 change is < N * tol: 1e-15 * 151 is near float64 noise
    ref = nx.pagerank(
        dg,
        alpha=DAMPING,
        personalization=pers,
        dangling=dangling,
        tol=1e-15,
        max_iter=100_000,
        weight="weight",
    )
    return np.array([ref[k] for k in keys])


def igraph_ranks(g: dict[str, Any], v: np.ndarray, dead_ends: str) -> np.ndarray:
    keys = g["keys"]
    n = keys.size
    edges = _simple_edges(g)
    pairs = [(int(np.searchsorted(keys, s)), int(np.searchsorted(keys, d))) for s, d in edges]
    weights = list(edges.values())
    if dead_ends == "uniform":
        has_out = {s for s, _ in pairs}
        for i in range(n):
            if i not in has_out:  # the stochasticity fix: a dead end links to every node alike
                pairs += [(i, j) for j in range(n)]
                weights += [1.0] * n
    gr = ig.Graph(n=n, edges=pairs, directed=True)
    gr.es["weight"] = weights
    return np.array(
        gr.personalized_pagerank(
            directed=True,
            damping=DAMPING,
            reset=v.tolist(),
            weights="weight",
            implementation="prpack",
        )
    )


@pytest.mark.parametrize("personalized", [False, True], ids=["uniform-teleport", "personalized"])
@pytest.mark.parametrize("weighted", [False, True], ids=["unweighted", "weighted"])
@pytest.mark.parametrize("dead_ends", ["teleport", "uniform"])
def test_agrees_with_networkx_and_igraph(
    stores: dict[tuple[bool, int], tuple[Path, dict[str, Any]]],
    tmp_path: Path,
    dead_ends: str,
    weighted: bool,
    personalized: bool,
) -> None:
    g = stores[(weighted, BLOCK_SIZES[0])][1]
    tele, v = _teleport(tmp_path, g, personalized)
    ref_nx = networkx_ranks(g, v, dead_ends)  # networkx.pagerank
    ref_ig = igraph_ranks(g, v, dead_ends)  # igraph Graph.personalized_pagerank (PRPACK)
    # the two references agree with each other, so the problem is stated the same way to both
    assert np.max(np.abs(ref_nx - ref_ig)) <= 1e-9
    n_dead = g["keys"].size - len({s for s, _ in _simple_edges(g)})
    assert n_dead >= 5  # the case under test is there: dead ends besides the isolated nodes
    for bn, method in itertools.product(BLOCK_SIZES, ("power", "gauss-seidel")):
        store = stores[(weighted, bn)][0]
        res = shardrank.rank(
            store,
            tmp_path / f"run-{bn}-{method}",
            RankOptions(
                damping=DAMPING,
                tol=1e-12,
                method=method,
                dead_ends=dead_ends,
                teleport=tele,
                threads=1,
            ),
        )
        assert res.converged, (bn, method)
        assert res.keys.to_pylist() == g["keys"].tolist()
        assert np.max(np.abs(res.scores - ref_nx)) <= 1e-9, (bn, method, "networkx")
        assert np.max(np.abs(res.scores - ref_ig)) <= 1e-9, (bn, method, "igraph")


def test_policies_coincide_for_a_uniform_teleport(
    stores: dict[tuple[bool, int], tuple[Path, dict[str, Any]]], tmp_path: Path
) -> None:
    """With a uniform teleport both dead-end policies are the same chain (common practice), so
    both runs equal networkx's default pagerank."""
    store, g = stores[(False, 50)]
    ref = networkx_ranks(
        g, np.full(g["keys"].size, 1.0 / g["keys"].size), "teleport"
    )  # networkx.pagerank
    runs = [
        shardrank.rank(store, tmp_path / p, RankOptions(dead_ends=p, tol=1e-12, threads=1)).scores
        for p in ("teleport", "uniform")
    ]
    assert np.array_equal(runs[0], runs[1])
    assert np.max(np.abs(runs[0] - ref)) <= 1e-9
