"""PageRank estimated by simulating random surfers, against shardrank's scores.

Reference: Avrachenkov, Litvak, Nemirovsky & Osipova, "Monte Carlo methods in PageRank
computation: When one iteration is sufficient", SIAM J. Numer. Anal. 45(2), 2007 (from
memory). A run starts at a page drawn from the teleport distribution v; at each page it stops
with probability 1 - d, otherwise it follows an out-link chosen in proportion to its weight
(a dead end instead jumps to a page drawn from v, or uniformly under --dead-ends uniform).
Since pi = (1 - d) sum_k d^k S^k v:

- "MC end-point with random start": the page where a run stops is distributed exactly as pi,
  so the share of runs ending at page j is a binomial estimate of pi_j;
- "MC complete path": a run visits page j on average pi_j / (1 - d) times, so (1 - d) times the
  mean number of visits per run also estimates pi_j;
- a run visits 1 / (1 - d) pages on average (geometric length): a surfer makes on average
  1 / (1 - d) steps per teleport, 5 at d = 0.8 (common practice).

Each estimate must agree within 5 standard errors (seeded, so the test is deterministic; a
fresh seed would fail with probability below 1e-5).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import shardrank
from shardrank import RankOptions
from tests.reference.test_exact_solve import dense_teleport, write_teleport

D = 0.8
N_RUNS = 200_000
# keys 0..7: weighted out-links; node 3 is a dead end; node 5 has a self-loop
SRC = [0, 0, 1, 1, 2, 4, 4, 5, 5, 6, 6, 7, 7, 2]
DST = [1, 2, 2, 3, 0, 5, 6, 5, 3, 7, 0, 4, 1, 4]
W = [1.0, 3.0, 2.0, 2.0, 1.0, 0.5, 1.5, 1.0, 4.0, 1.0, 1.0, 2.0, 1.0, 1.0]
TELEPORT_KEYS = [0, 4, 6]
TELEPORT_W = [2.0, 1.0, 1.0]


def simulate(
    n: int, v: np.ndarray, u: np.ndarray, seed: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """N_RUNS random surfers, vectorised.

    Returns (end page per run, visits per run and page, length per run).
    """
    rng = np.random.default_rng(seed)
    src, dst, w = np.array(SRC), np.array(DST), np.array(W)
    order = np.argsort(src, kind="stable")  # out-links grouped by source, for weighted choice
    src, dst, w = src[order], dst[order], w[order]
    cum = np.cumsum(w)
    w_out = np.bincount(src, weights=w, minlength=n)
    first = np.searchsorted(src, np.arange(n))  # first out-link of each page
    last = np.searchsorted(src, np.arange(n), side="right") - 1
    before = np.where(
        first > 0, cum[np.maximum(first - 1, 0)], 0.0
    )  # weight of earlier pages' links
    pos = rng.choice(n, size=N_RUNS, p=v)
    alive = np.ones(N_RUNS, dtype=bool)
    ends = np.full(N_RUNS, -1)
    visits = np.zeros((N_RUNS, n), dtype=np.int32)
    while alive.any():
        idx = np.flatnonzero(alive)
        here = pos[idx]
        visits[idx, here] += 1
        stop = rng.random(idx.size) >= D
        ends[idx[stop]] = here[stop]
        alive[idx[stop]] = False
        go, at = idx[~stop], here[~stop]
        nxt = np.empty(go.size, dtype=np.int64)
        linked = w_out[at] > 0
        a = at[linked]
        x = before[a] + rng.random(a.size) * w_out[a]
        nxt[linked] = dst[np.minimum(np.searchsorted(cum, x, side="right"), last[a])]
        nxt[~linked] = rng.choice(n, size=int((~linked).sum()), p=u)  # a dead end: jump
        pos[go] = nxt
    return ends, visits, visits.sum(axis=1)


@pytest.mark.parametrize("dead_ends", ["teleport", "uniform"])
def test_random_surfers_agree_with_the_scores(build, tmp_path: Path, dead_ends: str) -> None:
    store = build(SRC, DST, W, block_nodes=3)
    tele = write_teleport(tmp_path / "t.parquet", TELEPORT_KEYS, TELEPORT_W)
    res = shardrank.rank(
        store,
        tmp_path / "run",
        RankOptions(damping=D, teleport=str(tele), dead_ends=dead_ends, tol=1e-12, threads=1),
    )
    n = 8
    pi = res.scores
    v = dense_teleport(np.arange(n), np.array(TELEPORT_KEYS), np.array(TELEPORT_W))
    u = v if dead_ends == "teleport" else np.full(n, 1.0 / n)
    ends, visits, lengths = simulate(n, v, u, seed=2007)

    # MC end-point with random start: binomial standard error sqrt(pi (1 - pi) / R)
    end_share = np.bincount(ends, minlength=n) / N_RUNS
    se = np.sqrt(pi * (1 - pi) / N_RUNS)
    assert np.all(np.abs(end_share - pi) <= 5 * se), (end_share, pi)

    # MC complete path: (1 - d) * mean visits per run, standard error from the per-run spread
    per_run = (1 - D) * visits
    se_path = per_run.std(axis=0, ddof=1) / np.sqrt(N_RUNS)
    assert np.all(np.abs(per_run.mean(axis=0) - pi) <= 5 * se_path)

    # a run visits 1 / (1 - d) = 5 pages on average (common practice: steps per teleport)
    se_len = lengths.std(ddof=1) / np.sqrt(N_RUNS)
    assert abs(lengths.mean() - 1 / (1 - D)) <= 5 * se_len
    assert 1 / (1 - D) == pytest.approx(5.0)
    # and the statistical error is small enough for the check to mean something
    assert se.max() < 2e-3 and se_len < 0.02
