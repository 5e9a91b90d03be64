"""Compare two runs by key: L1 distance, rank correlations, top-k overlap, risers and fallers.

The join runs in DuckDB over the two ``scores.parquet`` files, in a scratch database that may
spill to disk, so memory stays bounded whatever N is. Only the union of both top-k (at most
2k rows) comes back into Python.

Conventions (shared with ``top`` and ``export``):

* position 1 is the highest score; equal scores are ordered by key;
* a key present in one run only counts with score 0 in the other (for ``l1``, ``kendall_tau``
  and ``spearman_rho``) and has no position there.
"""

from __future__ import annotations

import math
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
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
    """Make view ``name`` (key, score) of a run's scores; return the key type."""
    if res.run_dir is not None and (res.run_dir / runfiles.SCORES_PARQUET).is_file():
        path = res.run_dir / runfiles.SCORES_PARQUET
        key_type = pq.read_schema(path).field("key").type
        con.execute(
            f"CREATE VIEW {name} AS SELECT key, score FROM read_parquet({_sql_str(str(path))})"
        )
        return key_type
    table = pa.table({"key": res.keys, "score": pa.array(res.scores, type=pa.float64())})
    con.register(f"{name}_arrow", table)
    con.execute(f"CREATE VIEW {name} AS SELECT key, score FROM {name}_arrow")
    return table.schema.field("key").type


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
    with scratch_duckdb(threads) as con:
        ta = register_scores(con, "sa", ra)
        tb = register_scores(con, "sb", rb)
        if _kind(ta) != _kind(tb):
            raise BadInputError(
                f"the runs have different key types ({_kind(ta)} vs {_kind(tb)}); "
                "keys cannot be joined",
                hint="compare runs over stores built from the same kind of keys",
            )
        # Positions over the whole run: 1 = highest score, ties by key.
        for side in ("a", "b"):
            con.execute(
                f"CREATE TABLE p{side} AS SELECT key, score, "
                f"row_number() OVER (ORDER BY score DESC, key) AS pos FROM s{side}"
            )
        n_a, n_b, common, new, vanished, l1, max_abs = con.execute(
            """SELECT (SELECT count(*) FROM pa), (SELECT count(*) FROM pb),
                      count(*) FILTER (WHERE a.key IS NOT NULL AND b.key IS NOT NULL),
                      count(*) FILTER (WHERE a.key IS NULL),
                      count(*) FILTER (WHERE b.key IS NULL),
                      fsum(abs(coalesce(a.score, 0) - coalesce(b.score, 0))),
                      max(abs(coalesce(a.score, 0) - coalesce(b.score, 0)))
               FROM pa a FULL OUTER JOIN pb b ON a.key = b.key"""
        ).fetchall()[0]
        overlap: dict[str, float] = {}
        for kk in sorted({*OVERLAP_KS, k}):
            cap = max(1, min(kk, n_a, n_b))
            hits = con.execute(
                "SELECT count(*) FROM pa a JOIN pb b ON a.key = b.key "
                "WHERE a.pos <= ? AND b.pos <= ?",
                [cap, cap],
            ).fetchall()[0][0]
            overlap[str(kk)] = hits / cap
        union = fetch_arrow(
            con,
            f"""SELECT coalesce(a.key, b.key) AS key, a.pos AS position_a, b.pos AS position_b,
                      a.score AS score_a, b.score AS score_b
               FROM pa a FULL OUTER JOIN pb b ON a.key = b.key
               WHERE a.pos <= {int(k)} OR b.pos <= {int(k)}
               ORDER BY a.pos NULLS LAST, b.pos NULLS LAST""",
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
