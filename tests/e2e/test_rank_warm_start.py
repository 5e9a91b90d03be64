"""`--init RUN_OR_TABLE` (warm start) changes the speed, never the answer."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp

import shardrank
from shardrank import RankOptions
from shardrank.cli.main import main
from tests.conftest import random_graph, write_edges
from tests.reference.test_exact_solve import (
    dense_teleport,
    exact_pagerank,
    node_ids,
    write_teleport,
)

D = 0.85


def _store(tmp: Path, src: np.ndarray, dst: np.ndarray, name: str) -> Path:
    f = write_edges(tmp / f"{name}.parquet", src.tolist(), dst.tolist())
    out = tmp / name
    shardrank.build_store([f], out, shardrank.BuildOptions(block_nodes=300))
    return out


def test_warm_start_from_the_answer_needs_fewer_iterations_and_gives_the_same_answer(
    build, tmp_path: Path
) -> None:
    rng = np.random.default_rng(8)
    src, dst = random_graph(rng, 1500, 6000)
    store = build(src, dst, block_nodes=300)
    keys = np.unique(np.concatenate([src, dst]))
    exact = exact_pagerank(*node_ids(keys, src, dst), None, keys.size, D)  # scipy direct solve
    for method in ("power", "gauss-seidel"):
        cold = shardrank.rank(
            store, tmp_path / f"cold-{method}", RankOptions(method=method, tol=1e-10, threads=1)
        )
        warm = shardrank.rank(
            store,
            tmp_path / f"warm-{method}",
            RankOptions(method=method, tol=1e-10, threads=1, init=str(tmp_path / f"cold-{method}")),
        )
        assert cold.converged and warm.converged
        assert warm.iterations < cold.iterations / 3, (method, warm.iterations, cold.iterations)
        # both are within tol of the exact answer (scipy), so within 2 tol of each other
        assert np.abs(warm.scores - exact).sum() <= 1e-10
        assert np.abs(cold.scores - exact).sum() <= 1e-10
        assert warm.summary["init"]["kind"] == "warm" and warm.summary["init"]["new_nodes"] == 0


def test_warm_start_from_a_poor_guess_still_converges_to_the_answer(build, tmp_path: Path) -> None:
    rng = np.random.default_rng(81)
    src, dst = random_graph(rng, 500, 2000)
    store = build(src, dst, block_nodes=100)
    keys = np.unique(np.concatenate([src, dst]))
    table = tmp_path / "guess.parquet"  # all the mass on one node: far from the answer
    pq.write_table(pa.table({"key": keys[:1], "score": [1.0]}), table)
    exact = exact_pagerank(*node_ids(keys, src, dst), None, keys.size, D)
    res = shardrank.rank(
        store, tmp_path / "run", RankOptions(tol=1e-11, threads=1, init=str(table))
    )
    # scipy direct solve
    assert res.converged and np.abs(res.scores - exact).sum() <= 1e-11


def test_new_keys_start_at_their_teleport_value_and_vanished_keys_are_dropped(
    tmp_path: Path,
) -> None:
    rng = np.random.default_rng(82)
    src, dst = random_graph(rng, 400, 1600)
    old = _store(tmp_path, src, dst, "old")
    prev = shardrank.rank(old, tmp_path / "prev", RankOptions(tol=1e-10, threads=1))
    # the graph changes: keys 0..19 vanish, 1000..1029 are new
    keep = (src >= 20) & (dst >= 20)
    new_src = np.concatenate([src[keep], np.arange(1000, 1030)])
    new_dst = np.concatenate([dst[keep], rng.integers(20, 400, 30)])
    new = _store(tmp_path, new_src, new_dst, "new")
    keys = np.unique(np.concatenate([new_src, new_dst]))
    old_keys = np.array(prev.keys.to_pylist())
    t_keys = np.array([1000, 1001, 25, 30])
    tele = write_teleport(tmp_path / "t.parquet", t_keys.tolist(), [3.0, 1.0, 1.0, 1.0])
    v = dense_teleport(keys, t_keys, np.array([3.0, 1.0, 1.0, 1.0]))

    # one (power) step from the start vector: the result is G x0, so x0 can be checked exactly
    one = shardrank.rank(
        new,
        tmp_path / "one",
        RankOptions(
            max_iter=1, tol=1e-12, teleport=str(tele), init=str(tmp_path / "prev"), threads=1,
            method="power",
        ),
    )
    x0 = v.copy()  # new keys start at their teleport value ...
    both = np.isin(keys, old_keys)
    x0[both] = np.asarray(prev.scores)[
        np.searchsorted(old_keys, keys[both])
    ]  # ... the rest carry over
    x0 /= x0.sum()  # ... and vanished keys are dropped before renormalising
    s_id, d_id = node_ids(keys, new_src, new_dst)
    pairs = np.unique(np.stack([s_id, d_id], axis=1), axis=0)
    adj = sp.csc_matrix(
        (np.ones(len(pairs)), (pairs[:, 1], pairs[:, 0])), shape=(keys.size, keys.size)
    )
    out_deg = np.asarray(adj.sum(axis=0)).ravel()
    y = D * (adj @ np.where(out_deg > 0, x0 / np.maximum(out_deg, 1), 0.0))
    y += (D * x0[out_deg == 0].sum() + (1 - D)) * v  # dead ends follow the teleport
    assert np.max(np.abs(one.scores - y / y.sum())) <= 1e-15
    info = one.summary["init"]
    assert (info["matched"], info["new_nodes"], info["vanished_keys"]) == (
        both.sum(),
        (~both).sum(),
        20,
    )
    assert (~both).sum() == 30

    # and to the end: the same answer as a cold start (scipy direct solve)
    warm = shardrank.rank(
        new,
        tmp_path / "warm",
        RankOptions(tol=1e-10, teleport=str(tele), init=str(tmp_path / "prev"), threads=1),
    )
    exact = exact_pagerank(s_id, d_id, None, keys.size, D, v)
    assert warm.converged and np.abs(warm.scores - exact).sum() <= 1e-10


def test_cli_init_from_a_run(build, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rng = np.random.default_rng(83)
    src, dst = random_graph(rng, 300, 1200)
    store = build(src, dst)
    assert main(["rank", str(store), "--out", str(tmp_path / "a"), "--threads", "1", "-q"]) == 0
    assert (
        main(
            [
                "rank",
                str(store),
                "--out",
                str(tmp_path / "b"),
                "--threads",
                "1",
                "--init",
                str(tmp_path / "a"),
            ]
        )
        == 0
    )
    assert "warm start from" in capsys.readouterr().err
    a, b = (json.loads((tmp_path / x / "run.json").read_text()) for x in "ab")
    assert b["iterations"] < a["iterations"]
    sa, sb = (np.load(tmp_path / x / "scores.npy") for x in "ab")
    assert np.abs(sa - sb).sum() <= 2e-9  # each is within the default tol 1e-9 of the answer
