"""Compare two runs by key: L1 distance, rank correlations, top-k overlap, risers and fallers.

The join by key runs in DuckDB over the two ``scores.parquet`` files, in a scratch database
that spills to disk, so it never holds the keys in memory. Positions come from the
(memory-mapped) score vectors in numpy: a partial selection finds each top list in O(N), and
one sorted copy (8 bytes a node, one run at a time) counts the positions of the few keys that
need one. Only the union of both top lists (a few thousand rows) comes back into Python.

Conventions (shared with ``top`` and ``export``):

* position 1 is the highest score; equal scores are ordered by key;
* a key present in one run only counts with score 0 in the other (for ``l1``, ``kendall_tau``
  and ``spearman_rho``) and has no position there.
"""

from __future__ import annotations

import math
import shutil
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from scipy import stats

from .. import settings
from ..errors import BadInputError
from . import runfiles
from .result import RankResult, open_run

OVERLAP_KS = (10, 100, 1000)  # top-k sizes whose overlap is always reported
N_MOVERS = 20  # risers, fallers, new and vanished keys listed (counts are always complete)
_SCRATCH_MEMORY = "1GiB"  # DuckDB memory before it spills to its scratch directory

RunLike = str | Path | RankResult


def _sql_str(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


@contextmanager
def scratch_duckdb(threads: int | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
    """A DuckDB connection on a throwaway database that spills to a temporary directory."""
    tmp = Path(tempfile.mkdtemp(prefix="shardrank-duck-"))
    con = duckdb.connect(str(tmp / "scratch.duckdb"))
    try:
        con.execute(f"SET memory_limit = '{_SCRATCH_MEMORY}'")
        con.execute(f"SET temp_directory = {_sql_str(str(tmp / 'spill'))}")
        if threads:
            con.execute(f"SET threads = {int(threads)}")
        yield con
    finally:
        con.close()
        shutil.rmtree(tmp, ignore_errors=True)


def fetch_arrow(con: duckdb.DuckDBPyConnection, sql: str) -> pa.Table:
    """A small query result as an Arrow table (DuckDB 1.x and 2.x spellings)."""
    rel = con.sql(sql)
    if hasattr(rel, "to_arrow_table"):
        return rel.to_arrow_table()
    return rel.arrow()


def as_result(run: RunLike) -> RankResult:
    """A :class:`RankResult` from a run directory or a result (returned as is)."""
    return run if isinstance(run, RankResult) else open_run(run)


def register_scores(con: duckdb.DuckDBPyConnection, name: str, res: RankResult) -> pa.DataType:
    """Make view ``name`` (id, key, score) of a run's scores; return the key type."""
    if res.run_dir is not None and (res.run_dir / runfiles.SCORES_PARQUET).is_file():
        path = res.run_dir / runfiles.SCORES_PARQUET
        key_type = pq.read_schema(path).field("key").type
        con.execute(
            f"CREATE VIEW {name} AS SELECT file_row_number AS id, key, score "
            f"FROM read_parquet({_sql_str(str(path))}, file_row_number = true)"
        )
        return key_type
    table = pa.table(
        {
            "id": pa.array(np.arange(res.n_nodes, dtype=np.int64)),
            "key": res.keys,
            "score": pa.array(np.asarray(res.scores), type=pa.float64()),
        }
    )
    con.register(f"{name}_arrow", table)
    con.execute(f"CREATE VIEW {name} AS SELECT id, key, score FROM {name}_arrow")
    return table.schema.field("key").type


def positions(scores: np.ndarray, tiebreak: np.ndarray | None = None) -> np.ndarray:
    """int64[N]: the 1-based position of every node, highest score first.

    Equal scores are ordered by ``tiebreak`` (the rank of each node's key) when given, else
    by id, which is key order in every run made from a store.
    """
    s = np.asarray(scores)
    if tiebreak is None:
        order = np.argsort(-s, kind="stable")
    else:
        order = np.lexsort((tiebreak, -s))
    pos = np.empty(order.shape[0], dtype=np.int64)
    pos[order] = np.arange(1, order.shape[0] + 1, dtype=np.int64)
    return pos


def top_ids(scores: np.ndarray, n: int) -> np.ndarray:
    """int64: ids of the n best positions, best first (ties by id), in O(N) plus a small sort.

    A plain ``argpartition`` may keep any of the nodes tied at the n-th score; here exactly
    the ones of smallest id are kept.
    """
    s = np.asarray(scores)
    n = min(int(n), s.shape[0])
    if n <= 0:
        return np.zeros(0, dtype=np.int64)
    t = np.partition(s, s.shape[0] - n)[s.shape[0] - n]  # the n-th largest score
    above = np.flatnonzero(s > t)
    ids = np.concatenate([above, np.flatnonzero(s == t)[: n - above.size]])
    return ids[np.lexsort((ids, -s[ids]))].astype(np.int64)


def positions_of(scores: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """int64: the positions of the nodes ``ids`` (ties by id) without ranking all N nodes.

    One sorted copy of the scores counts the higher ones; ties are counted among smaller ids
    once per distinct tied value.
    """
    s = np.asarray(scores)
    ids = np.asarray(ids, dtype=np.int64)
    if ids.size == 0:
        return np.zeros(0, dtype=np.int64)
    srt = np.sort(s)
    v = s[ids]
    right = np.searchsorted(srt, v, side="right")
    pos = 1 + (s.shape[0] - right)  # 1 + how many score higher
    tied = right - np.searchsorted(srt, v, side="left") > 1
    for value in np.unique(v[tied]):
        same = np.flatnonzero(s == value)  # ids in increasing order
        sel = tied & (v == value)
        pos[sel] += np.searchsorted(same, ids[sel])  # equal scores of smaller id
    return pos


def keys_of(res: RankResult, ids: np.ndarray) -> list[Any]:
    """The keys of a few nodes, in the order of ``ids``, without reading every key."""
    ids = np.asarray(ids, dtype=np.int64)
    if res.run_dir is None or not (res.run_dir / runfiles.SCORES_PARQUET).is_file():
        return res.keys.take(pa.array(ids)).to_pylist()  # type: ignore[no-any-return]
    with scratch_duckdb() as con:
        register_scores(con, "s", res)
        con.register("wanted", pa.table({"id": pa.array(ids)}))
        t = fetch_arrow(con, "SELECT id, key FROM s JOIN wanted USING (id)")
    found = dict(zip(t.column("id").to_pylist(), t.column("key").to_pylist(), strict=True))
    return [found[i] for i in ids.tolist()]


def _key_rank(res: RankResult) -> np.ndarray:
    """The rank of each node's key (an in-memory result may hold its keys in any order)."""
    order = np.asarray(pc.sort_indices(res.keys).to_numpy(), dtype=np.int64)
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    return rank


def _ranked(res: RankResult, depth: int) -> tuple[np.ndarray, Callable[[list[int]], np.ndarray]]:
    """The ids of the best ``depth`` nodes, and a function giving the positions of any ids."""
    if res.run_dir is None:  # in memory: rank everything by (score, key)
        pos = positions(res.scores, tiebreak=_key_rank(res))
        ids = np.flatnonzero(pos <= depth)
        return ids[np.argsort(pos[ids])], lambda q: pos[np.asarray(q, dtype=np.int64)]
    return top_ids(res.scores, depth), lambda q: positions_of(res.scores, np.asarray(q))


def _kind(t: pa.DataType) -> str:
    return "integer" if pa.types.is_integer(t) else "string"


def _finite_or_none(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _correlations(sa: list[float], sb: list[float]) -> tuple[float | None, float | None]:
    """Kendall tau-b and Spearman rho (scipy.stats); None where undefined (< 2 rows, constant)."""
    if len(sa) < 2 or min(sa) == max(sa) or min(sb) == max(sb):
        return None, None  # a constant side has no ranking to correlate
    tau = stats.kendalltau(sa, sb).statistic
    rho = stats.spearmanr(sa, sb).statistic
    return _finite_or_none(float(tau)), _finite_or_none(float(rho))


def _mover(row: dict[str, Any]) -> dict[str, Any]:
    return {k: row[k] for k in ("key", "position_a", "position_b", "score_a", "score_b")}


def comparison(
    a: RunLike, b: RunLike, k: int = settings.COMPARE_K, threads: int | None = None
) -> tuple[dict[str, Any], pa.Table]:
    """Compare two runs; return the summary of :func:`compare_runs` and the joined top-k rows.

    The table holds the union of both top-k: ``key``, ``position_a``, ``position_b``,
    ``score_a``, ``score_b`` (nulls where a key is absent from a run), ordered by
    ``position_a`` then ``position_b``.
    """
    if k < 1:
        raise BadInputError(
            f"k must be at least 1 (got {k})", hint="pass -k 1000 or another positive number"
        )
    ra, rb = as_result(a), as_result(b)
    n_a, n_b = ra.n_nodes, rb.n_nodes
    # The best max(k, 1000) of each run by numpy on the score vectors (O(N)); positions of
    # the keys found there are counted afterwards, for those keys only.
    depth = max(k, *OVERLAP_KS)
    (top_a, where_a), (top_b, where_b) = _ranked(ra, depth), _ranked(rb, depth)
    with scratch_duckdb(threads) as con:
        ta = register_scores(con, "sa", ra)
        tb = register_scores(con, "sb", rb)
        if _kind(ta) != _kind(tb):
            raise BadInputError(
                f"the runs have different key types ({_kind(ta)} vs {_kind(tb)}); "
                "keys cannot be joined",
                hint="compare runs over stores built from the same kind of keys",
            )
        common, new, vanished, l1, max_abs = con.execute(
            """SELECT count(*) FILTER (WHERE a.key IS NOT NULL AND b.key IS NOT NULL),
                      count(*) FILTER (WHERE a.key IS NULL),
                      count(*) FILTER (WHERE b.key IS NULL),
                      fsum(abs(coalesce(a.score, 0) - coalesce(b.score, 0))),
                      max(abs(coalesce(a.score, 0) - coalesce(b.score, 0)))
               FROM sa a FULL OUTER JOIN sb b ON a.key = b.key"""
        ).fetchall()[0]
        con.register("top_a", pa.table({"id": pa.array(top_a, type=pa.int64())}))
        con.register("top_b", pa.table({"id": pa.array(top_b, type=pa.int64())}))
        # every key of either top list, with its id in both runs (null where absent)
        joined = fetch_arrow(
            con,
            """WITH u AS (SELECT key FROM sa JOIN top_a USING (id)
                          UNION SELECT key FROM sb JOIN top_b USING (id))
               SELECT u.key, a.id AS id_a, b.id AS id_b
               FROM u LEFT JOIN sa a ON a.key = u.key LEFT JOIN sb b ON b.key = u.key""",
        )
    id_a = joined.column("id_a").to_pylist()
    id_b = joined.column("id_b").to_pylist()
    pos_a = dict(
        zip(
            (i for i in id_a if i is not None),
            where_a([i for i in id_a if i is not None]).tolist(),
            strict=True,
        )
    )
    pos_b = dict(
        zip(
            (i for i in id_b if i is not None),
            where_b([i for i in id_b if i is not None]).tolist(),
            strict=True,
        )
    )
    all_rows = [
        {
            "key": key,
            "position_a": None if ia is None else int(pos_a[ia]),
            "position_b": None if ib is None else int(pos_b[ib]),
            "score_a": None if ia is None else float(ra.scores[ia]),
            "score_b": None if ib is None else float(rb.scores[ib]),
        }
        for key, ia, ib in zip(joined.column("key").to_pylist(), id_a, id_b, strict=True)
    ]
    overlap: dict[str, float] = {}
    for kk in sorted({*OVERLAP_KS, k}):
        cap = max(1, min(kk, n_a, n_b))
        hits = sum(
            1
            for r in all_rows
            if r["position_a"] is not None
            and r["position_b"] is not None
            and r["position_a"] <= cap
            and r["position_b"] <= cap
        )
        overlap[str(kk)] = hits / cap
    big = n_a + n_b + 1  # sorts absent positions last
    union_rows = sorted(
        (r for r in all_rows if (r["position_a"] or big) <= k or (r["position_b"] or big) <= k),
        key=lambda r: (r["position_a"] or big, r["position_b"] or big),
    )
    union = pa.Table.from_pylist(
        union_rows,
        schema=pa.schema(
            [
                ("key", joined.schema.field("key").type),
                ("position_a", pa.int64()),
                ("position_b", pa.int64()),
                ("score_a", pa.float64()),
                ("score_b", pa.float64()),
            ]
        ),
    )
    rows = union.to_pylist()
    tau, rho = _correlations(
        [r["score_a"] or 0.0 for r in rows], [r["score_b"] or 0.0 for r in rows]
    )
    both = [r for r in rows if r["position_a"] is not None and r["position_b"] is not None]
    # Risers: the largest climb in position first; equal climbs by their new position.
    risers = sorted(
        (r for r in both if r["position_b"] < r["position_a"]),
        key=lambda r: (r["position_b"] - r["position_a"], r["position_b"]),
    )
    fallers = sorted(
        (r for r in both if r["position_b"] > r["position_a"]),
        key=lambda r: (r["position_a"] - r["position_b"], r["position_a"]),
    )
    new_top = [
        {"key": r["key"], "position_b": r["position_b"], "score_b": r["score_b"]}
        for r in sorted((r for r in rows if r["position_a"] is None), key=lambda r: r["position_b"])
    ]
    gone_top = [
        {"key": r["key"], "position_a": r["position_a"], "score_a": r["score_a"]}
        for r in rows
        if r["position_b"] is None
    ]
    summary: dict[str, Any] = {
        "a": str(ra.run_dir) if ra.run_dir else None,
        "b": str(rb.run_dir) if rb.run_dir else None,
        "k": k,
        "n_a": int(n_a),
        "n_b": int(n_b),
        "common_keys": int(common),
        "new_keys": int(new),
        "vanished_keys": int(vanished),
        "l1": float(l1 or 0.0),
        "max_abs_diff": float(max_abs or 0.0),
        "kendall_tau": tau,
        "spearman_rho": rho,
        "union_top_k": len(rows),
        "overlap": overlap,
        "risers": [_mover(r) for r in risers[:N_MOVERS]],
        "fallers": [_mover(r) for r in fallers[:N_MOVERS]],
        "new_in_top_k": new_top[:N_MOVERS],
        "vanished_from_top_k": gone_top[:N_MOVERS],
        "same_store": _fingerprint(ra) is not None and _fingerprint(ra) == _fingerprint(rb),
    }
    return summary, union


def _fingerprint(r: RankResult) -> str | None:
    store = r.summary.get("store") or {}
    return store.get("fingerprint")


def compare_runs(a: RunLike, b: RunLike, k: int = settings.COMPARE_K) -> dict[str, Any]:
    """Compare run ``a`` (before) with run ``b`` (after), joined by key.

    Parameters
    ----------
    a, b
        Run directories (``str`` or ``Path``) or :class:`RankResult` objects.
    k
        Size of the top lists whose union feeds the rank correlations and the movers.

    Returns
    -------
    dict
        JSON-serialisable:

        ``l1``
            ``sum |score_a - score_b|`` over the union of keys (absent = 0); at most 2.
        ``kendall_tau``, ``spearman_rho``
            scipy.stats tau-b and rho of the two scores over the union of both top-k
            (absent = 0); ``None`` when undefined.
        ``overlap``
            ``{"10": .., "100": .., "1000": .., str(k): ..}``: ``|top_c(A) & top_c(B)| / c``
            with ``c = min(k, n_a, n_b)``.
        ``risers``, ``fallers``
            Up to 20 keys of the top-k union present in both runs, by the largest change of
            position: ``{key, position_a, position_b, score_a, score_b}``.
        ``new_keys``, ``vanished_keys``
            How many keys only ``b`` has, and only ``a`` has.

        Also ``n_a``, ``n_b``, ``common_keys``, ``max_abs_diff``, ``union_top_k``,
        ``new_in_top_k``, ``vanished_from_top_k``, ``same_store``, ``a``, ``b``, ``k``.
    """
    return comparison(a, b, k)[0]
