"""Worked examples published in the PageRank literature.

Both printed vectors below are quoted from memory, so each test also checks the run against
an exact solve of the same graph (scipy, see test_exact_solve.py) at full precision; the
printed digits then only have to agree to the precision they were printed with.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import shardrank
from shardrank import RankOptions
from tests.reference.test_exact_solve import exact_pagerank


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_langville_meyer_six_page_web(build, tmp_path: Path, method: str) -> None:
    # Langville & Meyer, "Google's PageRank and Beyond: The Science of Search Engine Rankings"
    # (Princeton University Press, 2006), ch. 4: the six-page web with page 2 dangling,
    #   1 -> 2, 3;  2 -> (none);  3 -> 1, 2, 5;  4 -> 5, 6;  5 -> 4, 6;  6 -> 4
    # made stochastic by S = H + a e^T / n (a dangling page links to every page alike) and
    # primitive by G = alpha S + (1 - alpha) e e^T / n with alpha = 0.9. The book prints
    #   pi^T = (.03721, .05396, .04151, .3751, .2060, .2862), ranking pages 4 6 5 2 3 1
    # (values from memory). Each printed value is checked to half a unit in its last place.
    src = [1, 1, 3, 3, 3, 4, 4, 5, 5, 6]
    dst = [2, 3, 1, 2, 5, 5, 6, 4, 6, 4]
    store = build(src, dst, block_nodes=2)
    res = shardrank.rank(
        store,
        tmp_path / "run",
        RankOptions(damping=0.9, dead_ends="uniform", method=method, tol=1e-12, threads=1),
    )
    assert res.converged and res.keys.to_pylist() == [1, 2, 3, 4, 5, 6]
    printed = [
        (0.03721, 5e-6),
        (0.05396, 5e-6),
        (0.04151, 5e-6),
        (0.3751, 5e-5),
        (0.2060, 5e-5),
        (0.2862, 5e-5),
    ]
    for got, (want, half_ulp) in zip(res.scores.tolist(), printed, strict=True):
        assert abs(got - want) <= half_ulp
    assert [k for k, _ in res.top(6)] == [4, 6, 5, 2, 3, 1]
    # the same graph by a direct solve (scipy), to full precision
    exact = exact_pagerank(np.array(src) - 1, np.array(dst) - 1, None, 6, 0.9, dead_ends="uniform")
    assert np.abs(res.scores - exact).sum() <= 1e-12


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_bryan_leise_four_page_web(build, tmp_path: Path, method: str) -> None:
    # Bryan & Leise, "The $25,000,000,000 Eigenvector: The Linear Algebra behind Google", SIAM
    # Review 48(3), 2006: the four-page web of their Figure 2.1,
    #   1 -> 2, 3, 4;  2 -> 3, 4;  3 -> 1;  4 -> 1, 3
    # has importance scores (12, 4, 9, 6) / 31 without damping, and with M = (1 - m) A + m S,
    # m = 0.15 (our damping d = 1 - m = 0.85), x = (0.368, 0.142, 0.288, 0.202) (values from
    # memory; printed to three decimals).
    store = build([1, 1, 1, 2, 2, 3, 4, 4], [2, 3, 4, 3, 4, 1, 1, 3])
    res = shardrank.rank(
        store, tmp_path / "run", RankOptions(damping=0.85, method=method, tol=1e-12, threads=1)
    )
    assert res.converged
    assert np.max(np.abs(res.scores - [0.368, 0.142, 0.288, 0.202])) <= 5e-4
    # the undamped vector is the d -> 1 limit: at d = 0.99 it is already close (and still ranks
    # the pages 1, 3, 4, 2)
    near = shardrank.rank(
        store, tmp_path / "near", RankOptions(damping=0.99, method=method, tol=1e-12, threads=1)
    )
    assert np.max(np.abs(near.scores - np.array([12, 4, 9, 6]) / 31)) <= 5e-3
    assert [k for k, _ in near.top(4)] == [1, 3, 4, 2]
