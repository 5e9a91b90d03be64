"""A fast comparison of the new run with the published one, for the refresh summary and guards.

It returns the figures of :func:`shardrank.results.compare.compare_runs` (same definitions;
a test checks that both agree) from arrays instead of a DuckDB join, because a refresh pays
for it every night: on a 2.4M-node store the join took 6.5 s, more than the warm start saves.

How: node ids follow key order in every store, so for integer keys the two key columns are
sorted and one ``searchsorted`` matches them (hash lookup otherwise). Positions (1 = highest
score, ties by key) are needed only for the keys of the two top-k lists: a sorted copy of
each score vector counts the higher scores; exact ties are counted among lower ids.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..results import runfiles

OVERLAP_KS = (10, 100, 1000)  # as results.compare: always reported
N_MOVERS = 3  # risers and fallers shown in the summary line


def _keys(run: Path) -> pa.Array:
    t = pq.read_table(run / runfiles.SCORES_PARQUET, columns=["key"])
    return t.column("key").combine_chunks()


def match_keys(old: pa.Array, new: pa.Array) -> np.ndarray:
    """int64[len(new)]: the index in ``old`` of each new key, -1 when absent."""
    if pa.types.is_integer(old.type) and pa.types.is_integer(new.type):
        a, b = old.to_numpy(), new.to_numpy()
        if a.size > 1 and b.size > 1 and np.all(a[1:] > a[:-1]) and np.all(b[1:] > b[:-1]):
            pos = np.minimum(np.searchsorted(a, b), a.size - 1)
            return np.where(a[pos] == b, pos, -1).astype(np.int64)
    m = pc.index_in(new, value_set=old)
    return np.asarray(m.fill_null(-1).to_numpy(zero_copy_only=False), dtype=np.int64)


def top_ids(scores: np.ndarray, k: int) -> np.ndarray:
    """Ids of the k highest scores, by score descending then id (= key order)."""
    n = scores.shape[0]
    k = min(k, n)
    if k <= 0:
        return np.empty(0, dtype=np.int64)
    t = -np.partition(-scores, k - 1)[k - 1]  # the k-th highest value
    above = np.flatnonzero(scores > t)
    ties = np.flatnonzero(scores == t)[: k - above.size]
    ids = np.concatenate([above, ties])
    return ids[np.lexsort((ids, -scores[ids]))]


def _avg_ranks(x: np.ndarray) -> np.ndarray:
    """Ranks 1..n, ties sharing their average rank."""
    order = np.argsort(x, kind="stable")
    xs = x[order]
    starts = np.flatnonzero(np.r_[True, xs[1:] != xs[:-1]])
    ends = np.r_[starts[1:], xs.size]
    ranks = np.empty(x.size)
    ranks[order] = np.repeat((starts + ends + 1) / 2.0, ends - starts)
    return ranks


def correlations(x: np.ndarray, y: np.ndarray) -> tuple[float | None, float | None]:
    """Kendall's tau-b and Spearman's rho of two short vectors (the top-k union; O(n^2) pairs).

    tau-b = (concordant - discordant) / sqrt((n0 - ties in x) (n0 - ties in y)), n0 = n(n-1)/2;
    rho = Pearson correlation of the average ranks. The definitions of scipy.stats.kendalltau
    (variant "b") and spearmanr, imported here only in the test that checks the agreement:
    importing scipy.stats costs more than the whole comparison on small stores.
    """
    n = x.size
    if n < 2:
        return None, None
    iu = np.triu_indices(n, 1)
    sx = np.sign(x[:, None] - x[None, :])[iu]
    sy = np.sign(y[:, None] - y[None, :])[iu]
    n0 = sx.size
    den = math.sqrt(float(np.count_nonzero(sx)) * float(np.count_nonzero(sy)))
    tau = float(np.dot(sx, sy)) / den if den > 0 and n0 else None
    rx, ry = _avg_ranks(x), _avg_ranks(y)
    rx -= rx.mean()
    ry -= ry.mean()
    d = math.sqrt(float(np.dot(rx, rx)) * float(np.dot(ry, ry)))
    rho = float(np.dot(rx, ry)) / d if d > 0 else None
    return tau, rho


class _Positions:
    """Position (1 = highest, ties by id) of a few ids, from one sorted copy of the scores."""

    def __init__(self, scores: np.ndarray) -> None:
        self.scores = scores
        self.neg_sorted = np.sort(-scores)  # ascending negatives = scores descending

    def of(self, i: int) -> int:
        v = -self.scores[i]
        lo = int(np.searchsorted(self.neg_sorted, v, side="left"))  # how many score higher
        hi = int(np.searchsorted(self.neg_sorted, v, side="right"))
        tied_before = 0 if hi - lo == 1 else int(np.count_nonzero(self.scores[:i] == -v))
        return lo + tied_before + 1


def compare_scores(prev: Path, new: Path, k: int, extra_ks: tuple[int, ...] = ()) -> dict[str, Any]:
    """Compare run ``prev`` (before) with run ``new`` (after) by key; see the module docstring."""
    a = np.load(prev / runfiles.SCORES_NPY, mmap_mode="r")
    b = np.load(new / runfiles.SCORES_NPY, mmap_mode="r")
    a, b = np.asarray(a), np.asarray(b)
    ka, kb = _keys(prev), _keys(new)
    m = match_keys(ka, kb)  # new id -> old id
    hit = m >= 0
    inv = np.full(a.shape[0], -1, dtype=np.int64)  # old id -> new id
    inv[m[hit]] = np.flatnonzero(hit)
    diff = np.abs(b[hit] - a[m[hit]])
    gone = inv < 0
    l1 = math.fsum((float(diff.sum()), float(b[~hit].sum()), float(a[gone].sum())))
    max_abs = max(
        float(diff.max(initial=0.0)),
        float(b[~hit].max(initial=0.0)),
        float(a[gone].max(initial=0.0)),
    )
    n_a, n_b = a.shape[0], b.shape[0]
    overlap: dict[str, float] = {}
    for kk in sorted({*OVERLAP_KS, k, *extra_ks}):
        cap = max(1, min(kk, n_a, n_b))
        ta, tb = top_ids(a, cap), top_ids(b, cap)
        overlap[str(kk)] = int(np.isin(m[tb], ta).sum()) / cap
    # the union of both top-k, as (old id or -1, new id or -1)
    ta, tb = top_ids(a, k), top_ids(b, k)
    in_ta = np.zeros(n_a, dtype=bool)
    in_ta[ta] = True
    rows = [(int(o), int(inv[o])) for o in ta]
    rows += [(int(m[j]), int(j)) for j in tb if m[j] < 0 or not in_ta[m[j]]]
    sa = [float(a[o]) if o >= 0 else 0.0 for o, _ in rows]
    sb = [float(b[j]) if j >= 0 else 0.0 for _, j in rows]
    tau, rho = correlations(np.array(sa), np.array(sb))
    pa_, pb_ = _Positions(a), _Positions(b)
    both = [(o, j, pa_.of(o), pb_.of(j)) for o, j in rows if o >= 0 and j >= 0]

    def mover(o: int, j: int, p: int, q: int) -> dict[str, Any]:
        return {
            "key": kb[j].as_py(),
            "position_a": p,
            "position_b": q,
            "score_a": float(a[o]),
            "score_b": float(b[j]),
        }

    risers = sorted((r for r in both if r[3] < r[2]), key=lambda r: (r[3] - r[2], r[3]))
    fallers = sorted((r for r in both if r[3] > r[2]), key=lambda r: (r[2] - r[3], r[2]))
    return {
        "l1": l1,
        "max_abs_diff": max_abs,
        "kendall_tau": tau,
        "spearman_rho": rho,
        "overlap": overlap,
        "new_keys": int((~hit).sum()),
        "vanished_keys": int(gone.sum()),
        "risers": [mover(*r) for r in risers[:N_MOVERS]],
        "fallers": [mover(*r) for r in fallers[:N_MOVERS]],
    }
