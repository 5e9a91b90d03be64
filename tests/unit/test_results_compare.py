"""compare_runs: L1, Kendall tau, Spearman rho, top-k overlap, movers, new and vanished keys.

Checked three ways: pairs worked out by hand (the arithmetic is in the comments), an
independent pure-Python join fed to scipy.stats on random score vectors, and real runs.
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pytest
from scipy import stats

import shardrank
from shardrank.errors import BadInputError
from shardrank.results.compare import compare_runs, comparison
from shardrank.results.result import RankResult


def mem(keys: Sequence[Any], scores: Sequence[float]) -> RankResult:
    """An in-memory result (no run directory): compare registers it with DuckDB directly."""
    return RankResult(None, np.asarray(scores, dtype=np.float64), pa.array(list(keys)), {})


def test_hand_worked_reversal_with_new_and_vanished_keys() -> None:
    # A: a .4, b .3, c .2, d .1     B: a .1, b .2, c .3, e .4
    a = mem(["a", "b", "c", "d"], [0.4, 0.3, 0.2, 0.1])
    b = mem(["a", "b", "c", "e"], [0.1, 0.2, 0.3, 0.4])
    s = compare_runs(a, b, k=2)
    # L1 by hand: |.4-.1| + |.3-.2| + |.2-.3| + |.1-0| (d absent in B) + |0-.4| (e absent in A)
    # = .3 + .1 + .1 + .1 + .4 = 1.0
    assert s["l1"] == pytest.approx(1.0, abs=1e-15)
    assert (s["new_keys"], s["vanished_keys"], s["common_keys"]) == (1, 1, 3)
    # top-2: A {a, b}, B {e, c}; union {a, b, c, e}; scores (A, B): a (.4,.1) b (.3,.2) c (.2,.3)
    # e (0,.4): B orders them exactly in reverse, so every pair is discordant: tau = rho = -1.
    assert s["union_top_k"] == 4
    assert s["kendall_tau"] == pytest.approx(-1.0)
    assert s["spearman_rho"] == pytest.approx(-1.0)
    # overlap at 10, 100, 1000 is capped at N = 4: top-4 A {a,b,c,d}, B {e,c,b,a} share 3 -> 0.75;
    # at k = 2: {a,b} and {e,c} share nothing.
    assert s["overlap"] == {"2": 0.0, "10": 0.75, "100": 0.75, "1000": 0.75}
    # positions A: a1 b2 c3 d4; B: e1 c2 b3 a4 -> c rose 3->2; a fell 1->4, b fell 2->3
    assert [(r["key"], r["position_a"], r["position_b"]) for r in s["risers"]] == [("c", 3, 2)]
    assert [(r["key"], r["position_a"], r["position_b"]) for r in s["fallers"]] == [
        ("a", 1, 4),
        ("b", 2, 3),
    ]
    assert s["new_in_top_k"] == [{"key": "e", "position_b": 1, "score_b": 0.4}]
    json.dumps(s, allow_nan=False)  # the nightly job stores this as strict JSON


def test_hand_worked_kendall_and_spearman() -> None:
    # x = 1..5 and y = 3 4 1 2 5 (scores proportional). By hand: of the 10 pairs, 6 are
    # concordant and 4 discordant, so tau = (6 - 4) / 10 = 0.2; rank differences -2 -2 2 2 0
    # give sum d^2 = 16 and rho = 1 - 6 * 16 / (5 * (25 - 1)) = 0.2.
    keys = ["k1", "k2", "k3", "k4", "k5"]
    x, y = [1, 2, 3, 4, 5], [3, 4, 1, 2, 5]
    a, b = mem(keys, [v / 15 for v in x]), mem(keys, [v / 15 for v in y])
    s = compare_runs(a, b, k=5)
    assert s["kendall_tau"] == pytest.approx(0.2)
    assert s["spearman_rho"] == pytest.approx(0.2)
    assert s["l1"] == pytest.approx(8 / 15)  # (2 + 2 + 2 + 2 + 0) / 15
    assert s["overlap"]["10"] == 1.0  # capped at N = 5: the same five keys
    # k = 2: top-2 A {k5, k4}, B {k5, k2}: overlap 1/2. Union {k5, k4, k2}, A scores 5 4 2, B 5 2 4:
    # pairs (k5,k4) C, (k5,k2) C, (k4,k2) D -> tau = 1/3; ranks A 3 2 1, B 3 1 2 -> sum d^2 = 2,
    # rho = 1 - 6 * 2 / (3 * 8) = 0.5.
    s2 = compare_runs(a, b, k=2)
    assert s2["overlap"]["2"] == 0.5
    assert s2["kendall_tau"] == pytest.approx(1 / 3)
    assert s2["spearman_rho"] == pytest.approx(0.5)


def test_equal_scores_are_ordered_by_key() -> None:
    # common practice: a deterministic order for ties; ours is key order
    a = mem(["z", "y", "x"], [1 / 3, 1 / 3, 1 / 3])
    b = mem(["x", "y", "z"], [0.5, 0.25, 0.25])
    _, union = comparison(a, b, k=3)
    pos = {r["key"]: (r["position_a"], r["position_b"]) for r in union.to_pylist()}
    assert pos == {"x": (1, 1), "y": (2, 2), "z": (3, 3)}


def test_identical_runs() -> None:
    a = mem(["p", "q", "r"], [0.5, 0.3, 0.2])
    s = compare_runs(a, a, k=10)
    assert s["l1"] == 0.0 and s["risers"] == [] and s["fallers"] == []
    assert s["kendall_tau"] == pytest.approx(1.0) and s["spearman_rho"] == pytest.approx(1.0)
    assert set(s["overlap"].values()) == {1.0}


def _reference(
    ka: list[str], sa: np.ndarray, kb: list[str], sb: np.ndarray, k: int
) -> dict[str, Any]:
    """The same quantities with plain dicts and sorts, and scipy.stats for the correlations."""
    da, db = dict(zip(ka, sa.tolist(), strict=True)), dict(zip(kb, sb.tolist(), strict=True))
    keys = set(da) | set(db)
    l1 = math.fsum(abs(da.get(x, 0.0) - db.get(x, 0.0)) for x in keys)
    order_a = sorted(da, key=lambda x: (-da[x], x))
    order_b = sorted(db, key=lambda x: (-db[x], x))
    union = set(order_a[:k]) | set(order_b[:k])
    u = sorted(union)
    tau = stats.kendalltau([da.get(x, 0.0) for x in u], [db.get(x, 0.0) for x in u]).statistic
    rho = stats.spearmanr([da.get(x, 0.0) for x in u], [db.get(x, 0.0) for x in u]).statistic
    overlap = {}
    for kk in (10, 100, 1000, k):
        c = min(kk, len(da), len(db))
        overlap[str(kk)] = len(set(order_a[:c]) & set(order_b[:c])) / c
    return {
        "l1": l1,
        "kendall_tau": tau,
        "spearman_rho": rho,
        "overlap": overlap,
        "new_keys": len(set(db) - set(da)),
        "vanished_keys": len(set(da) - set(db)),
    }


@pytest.mark.parametrize(("seed", "similar"), [(1, False), (2, False), (3, True)])
def test_random_pairs_against_scipy(seed: int, similar: bool) -> None:
    rng = np.random.default_rng(seed)
    universe = [f"https://host{i % 37}.example/p/{i}" for i in range(1500)]
    ia = rng.choice(len(universe), 1200, replace=False)
    ib = np.r_[ia[100:], rng.choice(np.setdiff1d(np.arange(1500), ia), 100, replace=False)]
    sa = rng.pareto(1.5, ia.size) + 1e-3
    sa[:50] = sa[0]  # some exact ties
    if similar:  # B: the same scores slightly perturbed (a night with few changes)
        sb = np.r_[sa[100:], sa[:100]] * (1 + 0.01 * rng.standard_normal(ia.size))
    else:
        sb = rng.pareto(1.5, ib.size) + 1e-3
    sa, sb = sa / sa.sum(), sb / sb.sum()
    ka, kb = [universe[i] for i in ia], [universe[i] for i in ib]
    k = 150
    got = compare_runs(mem(ka, sa), mem(kb, sb), k=k)
    want = _reference(ka, sa, kb, sb, k)
    assert got["l1"] == pytest.approx(want["l1"], rel=1e-12)
    assert got["kendall_tau"] == pytest.approx(want["kendall_tau"], rel=1e-12)
    assert got["spearman_rho"] == pytest.approx(want["spearman_rho"], rel=1e-12)
    assert got["overlap"] == want["overlap"]
    assert (got["new_keys"], got["vanished_keys"]) == (want["new_keys"], want["vanished_keys"])


def test_real_runs_from_directories(build: Any, tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    src, dst = rng.integers(0, 300, 1500), rng.integers(0, 300, 1500)
    store = build([f"n{i:03d}" for i in src], [f"n{i:03d}" for i in dst])
    seeds = tmp_path / "seeds.csv"
    seeds.write_text("key,weight\nn001,1\nn002,1\n")
    ra = shardrank.rank(store, tmp_path / "a.run")
    rb = shardrank.rank(store, tmp_path / "b.run", shardrank.RankOptions(teleport=str(seeds)))
    got = compare_runs(tmp_path / "a.run", str(tmp_path / "b.run"), k=50)
    keys = ra.keys.to_pylist()
    want = _reference(keys, np.asarray(ra.scores), keys, np.asarray(rb.scores), 50)
    # the L1 distance of two vectors over the same ids, by numpy
    assert got["l1"] == pytest.approx(float(np.abs(ra.scores - rb.scores).sum()), rel=1e-12)
    assert got["kendall_tau"] == pytest.approx(want["kendall_tau"], rel=1e-12)
    assert got["spearman_rho"] == pytest.approx(want["spearman_rho"], rel=1e-12)
    assert got["overlap"] == want["overlap"] and got["same_store"]
    assert got["n_a"] == got["n_b"] == ra.n_nodes
    # run directories take the O(N) path (partial selection, counted positions); in-memory
    # results rank everything: both must agree, also on the many zero-score ties of b
    in_memory = compare_runs(mem(keys, ra.scores), mem(keys, rb.scores), k=50)
    for field in ("l1", "overlap", "risers", "fallers", "kendall_tau", "spearman_rho"):
        assert got[field] == in_memory[field], field


def test_integer_and_string_keys_do_not_join() -> None:
    with pytest.raises(BadInputError, match="key types"):
        compare_runs(mem([1, 2], [0.5, 0.5]), mem(["1", "2"], [0.5, 0.5]))


def test_k_must_be_positive() -> None:
    with pytest.raises(BadInputError):
        compare_runs(mem(["a"], [1.0]), mem(["a"], [1.0]), k=0)
