"""PageRank of small graphs whose answer is known in closed form, solved by hand below."""

from __future__ import annotations

from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

import shardrank
from shardrank import RankOptions
from tests.reference.test_exact_solve import write_teleport

METHODS = ("power", "gauss-seidel")


def _rank(store: Path, out: Path, **opts: object) -> shardrank.RankResult:
    res = shardrank.rank(store, out, RankOptions(tol=1e-13, threads=1, **opts))  # type: ignore[arg-type]
    assert res.converged
    return res


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("block_nodes", [3, 64])
def test_directed_cycle_is_uniform(build, tmp_path: Path, method: str, block_nodes: int) -> None:
    # closed form: on a directed cycle G is doubly stochastic (each node has one in-link and one
    # out-link), so the uniform vector is its fixed point for every damping and every teleport
    # that is itself uniform.
    n = 17
    store = build(list(range(n)), [(i + 1) % n for i in range(n)], block_nodes=block_nodes)
    for d in (0.5, 0.85, 0.99):
        res = _rank(store, tmp_path / f"r{d}", method=method, damping=d)
        assert np.max(np.abs(res.scores - 1.0 / n)) <= 1e-15


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("self_loops", [False, True])
def test_complete_graph_is_uniform(build, tmp_path: Path, method: str, self_loops: bool) -> None:
    # closed form: every node has the same in- and out-links, so by symmetry every score is 1/n
    n = 9
    pairs = [(i, j) for i in range(n) for j in range(n) if i != j or self_loops]
    store = build([p[0] for p in pairs], [p[1] for p in pairs], block_nodes=4)
    res = _rank(store, tmp_path / "r", method=method)
    assert np.max(np.abs(res.scores - 1.0 / n)) <= 1e-15


@pytest.mark.parametrize("method", METHODS)
def test_personalized_cycle_is_geometric(build, tmp_path: Path, method: str) -> None:
    # closed form: cycle 0 -> 1 -> ... -> n-1 -> 0, every teleport lands on node 0 (v = e_0):
    #   r_k = d r_{k-1} for k >= 1  =>  r_k = d^k r_0
    #   r_0 = (1 - d) + d r_{n-1} = (1 - d) + d^n r_0  =>  r_0 = (1 - d) / (1 - d^n)
    # so r_k = (1 - d) d^k / (1 - d^n): the surfer's distance from the seed is geometric.
    n, d = 12, 0.8
    store = build(list(range(n)), [(i + 1) % n for i in range(n)], block_nodes=5)
    tele = write_teleport(tmp_path / "seed.parquet", [0], [1.0])
    res = _rank(store, tmp_path / "r", method=method, damping=d, teleport=str(tele))
    k = np.arange(n)
    expected = (1 - d) * d**k / (1 - d**n)
    assert np.max(np.abs(res.scores - expected)) <= 1e-13


@pytest.mark.parametrize("method", METHODS)
def test_dead_end_graph_solved_by_hand(build, tmp_path: Path, method: str) -> None:
    # A -> B, A -> C, B -> C; C is a dead end. d = 1/2, uniform teleport, N = 3.
    # Every node receives d * r_C / 3 (C's score spread by the teleport) + (1 - d) / 3, i.e.
    # (r_C + 1) / 6; A's two out-links carry r_A / 2 each, B's one carries r_B:
    #   r_A = (r_C + 1) / 6
    #   r_B = 1/2 * r_A / 2 + (r_C + 1) / 6           = 5 (r_C + 1) / 24
    #   r_C = 1/2 * (r_A / 2 + r_B) + (r_C + 1) / 6   = (2 + 5 + 8) (r_C + 1) / 48
    #                                                 = 5 (r_C + 1) / 16
    # so 16 r_C = 5 r_C + 5, r_C = 5/11, r_C + 1 = 16/11, and
    #   r = (8/33, 10/33, 15/33)   (sums to 1; both dead-end policies agree: v is uniform)
    expected = [Fraction(8, 33), Fraction(10, 33), Fraction(15, 33)]
    assert sum(expected) == 1
    store = build(["A", "A", "B"], ["B", "C", "C"])
    for policy in ("teleport", "uniform"):
        res = _rank(store, tmp_path / policy, method=method, damping=0.5, dead_ends=policy)
        assert res.keys.to_pylist() == ["A", "B", "C"]
        assert np.max(np.abs(res.scores - np.array([float(x) for x in expected]))) <= 1e-13


@pytest.mark.parametrize("method", METHODS)
def test_dead_end_policies_solved_by_hand(build, tmp_path: Path, method: str) -> None:
    # A -> B; B is a dead end; every teleport lands on A (v = e_A); damping d = 0.85.
    # Policy "teleport" (B's score follows v, i.e. goes to A):
    #   r_A = (1 - d) + d r_B,  r_B = d r_A  =>  r_A = 1 / (1 + d),  r_B = d / (1 + d)
    # Policy "uniform" (B's score is spread over A and B alike):
    #   r_B = d r_A + d r_B / 2  =>  r_B = 2 d r_A / (2 - d);  r_A + r_B = 1
    #   =>  r_A = (2 - d) / (2 + d),  r_B = 2 d / (2 + d)
    #   (check: (1 - d) + d r_B / 2 = ((1 - d)(2 + d) + d^2) / (2 + d) = (2 - d) / (2 + d))
    d = 0.85
    store = build(["A"], ["B"])
    tele = write_teleport(tmp_path / "seed.parquet", ["A"], [3.0])
    strong = _rank(
        store, tmp_path / "t", method=method, damping=d, teleport=str(tele), dead_ends="teleport"
    )
    weak = _rank(
        store, tmp_path / "u", method=method, damping=d, teleport=str(tele), dead_ends="uniform"
    )
    assert np.max(np.abs(strong.scores - [1 / (1 + d), d / (1 + d)])) <= 1e-13
    assert np.max(np.abs(weak.scores - [(2 - d) / (2 + d), 2 * d / (2 + d)])) <= 1e-13


@pytest.mark.parametrize("method", METHODS)
def test_weighted_graph_solved_by_hand(build, tmp_path: Path, method: str) -> None:
    # A -> B (weight 3), A -> C (weight 1), B -> A, C -> A; d = 1/2, uniform teleport:
    #   r_B = 1/2 * 3/4 r_A + 1/6,  r_C = 1/2 * 1/4 r_A + 1/6
    #   r_A = 1/2 (r_B + r_C) + 1/6 = 1/2 (r_A / 2 + 1/3) + 1/6 = r_A / 4 + 1/3  =>  r_A = 4/9
    #   r_B = 3/8 * 4/9 + 1/6 = 1/3,  r_C = 1/8 * 4/9 + 1/6 = 2/9
    # The store sums the weights of duplicate rows, so A -> B is given as 1 + 2; B and C have one
    # out-link each, so their weights (5, 0.25) normalise to 1.
    store = build(["A", "A", "A", "B", "C"], ["B", "B", "C", "A", "A"], [1.0, 2.0, 1.0, 5.0, 0.25])
    res = _rank(store, tmp_path / "r", method=method, damping=0.5)
    assert np.max(np.abs(res.scores - [4 / 9, 1 / 3, 2 / 9])) <= 1e-13
