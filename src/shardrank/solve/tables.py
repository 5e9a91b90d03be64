"""Key-mapped input vectors: a teleport (personalization) table and a warm-start table.

Both are joined to the store's nodes.parquet by key with DuckDB; only N-sized arrays reach Python.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np

from ..errors import BadInputError
from ..ingest.sources import resolve_inputs
from ..ingest.tables import arrow_table, describe, key_class, scan_sql, sql_ident, sql_str
from ..store.reader import StoreReader

_RUN_SCORES = "scores.parquet"


def _table(con: duckdb.DuckDBPyConnection, path: str, value_names: tuple[str, ...], what: str,
           reader: StoreReader) -> tuple[str, str, str]:
    p = Path(path)
    if p.is_dir() and (p / _RUN_SCORES).is_file():
        path = str(p / _RUN_SCORES)
    files = resolve_inputs([path])
    schema = describe(con, files)
    names = [n for n, _ in schema]
    types = dict(schema)
    key = "key" if "key" in types else names[0]
    val = next((n for n in value_names if n in types), None)
    if val is None:
        rest = [n for n in names if n != key]
        if not rest:
            raise BadInputError(f"{path}: {what} table needs a key and a value column (found: {', '.join(names)})",
                                hint=f"columns: key, {value_names[0]}")
        val = rest[0]
    if key_class(types[key]) != reader.manifest.key_type:
        # a header-only CSV reads as text columns with no rows: say it is empty, not mistyped
        if not con.execute(f"SELECT count(*) FROM {scan_sql(files)}").fetchall()[0][0]:
            raise BadInputError(f"{path}: the {what} table is empty", hint="give at least one key with a positive value")
        raise BadInputError(
            f"{path}: keys are {types[key]} but the store's keys are {reader.manifest.key_type}",
            hint="use the same key type as the edge tables")
    return scan_sql(files), key, val


def _join(reader: StoreReader, path: str, value_names: tuple[str, ...], what: str,
          ignore_unknown: bool) -> tuple[np.ndarray, np.ndarray, int]:
    """(ids, values, n_unknown) with values summed per key; errors name a few unknown keys."""
    con = duckdb.connect()
    try:
        src, key, val = _table(con, path, value_names, what, reader)
        kt = "BIGINT" if reader.manifest.key_type == "int64" else "VARCHAR"
        con.execute(f"CREATE TEMP VIEW t AS SELECT CAST({sql_ident(key)} AS {kt}) AS key, "
                    f"CAST({sql_ident(val)} AS DOUBLE) AS v FROM {src}")
        con.execute(f"CREATE TEMP VIEW nodes AS SELECT id, key FROM read_parquet({sql_str(str(reader.nodes_path()))})")
        bad = con.execute(
            "SELECT count(*) FILTER (WHERE key IS NULL), count(*) FILTER (WHERE v IS NULL OR isnan(v)), "
            "count(*) FILTER (WHERE isinf(v)), count(*) FILTER (WHERE v < 0), count(*) FROM t").fetchall()[0]
        assert bad is not None
        if bad[4] == 0:
            raise BadInputError(f"{path}: the {what} table is empty", hint="give at least one key with a positive value")
        probs = [f"{c:,} {w}" for c, w in zip(bad[:4], ("null keys", "null or NaN values", "infinite values",
                                                         "negative values"), strict=True) if c]
        if probs:
            raise BadInputError(f"{path}: the {what} table has {', '.join(probs)}",
                                hint=f"every {what} value must be a finite number >= 0")
        unknown = con.execute("SELECT count(*) FROM t ANTI JOIN nodes USING (key)").fetchall()[0]
        n_unknown = int(unknown[0]) if unknown else 0
        if n_unknown and not ignore_unknown:
            ex = [repr(r[0]) for r in con.execute("SELECT key FROM t ANTI JOIN nodes USING (key) LIMIT 5").fetchall()]
            raise BadInputError(
                f"{path}: {n_unknown:,} {what} keys are not nodes of the store (e.g. {', '.join(ex)})",
                hint="fix the keys, or pass --ignore-unknown-keys to skip them (they are reported)")
        res = arrow_table(con, "SELECT n.id, sum(t.v) FROM t JOIN nodes n USING (key) GROUP BY n.id ORDER BY n.id")
    except duckdb.Error as e:
        raise BadInputError(f"{path}: cannot read the {what} table ({str(e).splitlines()[0]})") from None
    finally:
        con.close()
    ids = res.column(0).to_numpy().astype(np.int64)
    vals = res.column(1).to_numpy().astype(np.float64)
    return ids, vals, n_unknown


def load_teleport(reader: StoreReader, path: str, ignore_unknown: bool) -> tuple[np.ndarray, np.ndarray, int]:
    """Sparse teleport distribution: sorted ids, values summing to 1, and the unknown-key count."""
    ids, vals, n_unknown = _join(reader, path, ("weight", "score", "value"), "teleport", ignore_unknown)
    total = float(vals.sum()) if vals.size else 0.0
    if not total > 0:
        raise BadInputError(f"{path}: the teleport weights of known keys sum to zero",
                            hint="give at least one store key a positive weight")
    keep = vals > 0
    return ids[keep], vals[keep] / total, n_unknown


def load_init(reader: StoreReader, path: str) -> tuple[np.ndarray, np.ndarray, int]:
    """Warm-start scores by id (keys the store lacks are dropped and counted)."""
    fast = _init_from_int_run(reader, path)
    if fast is not None:
        return fast
    return _join(reader, path, ("score", "rank", "value"), "warm-start", True)


def _init_from_int_run(reader: StoreReader, path: str) -> tuple[np.ndarray, np.ndarray, int] | None:
    """Fast path of :func:`load_init` for an earlier run over integer keys: ids follow key order
    in every store, so both key columns are sorted and one searchsorted matches them (0.35 s
    instead of 3.5 s for the join on 4.6M nodes). None (use the join) when anything differs."""
    import pyarrow.parquet as pq

    f = Path(path) / _RUN_SCORES
    if reader.manifest.key_type != "int64" or not (Path(path).is_dir() and f.is_file()):
        return None
    try:
        t = pq.read_table(f, columns=["key", "score"])
        new = pq.read_table(reader.nodes_path(), columns=["key"]).column("key").to_numpy()
    except Exception:  # unreadable or other columns: the join reports it properly
        return None
    old, sc = t.column("key").to_numpy(), t.column("score").to_numpy()
    if (old.dtype.kind not in "iu" or new.dtype.kind not in "iu" or sc.dtype != np.float64 or not old.size
            or np.any(old[1:] <= old[:-1]) or np.any(new[1:] <= new[:-1])
            or not np.all(np.isfinite(sc)) or sc.min() < 0):
        return None
    pos = np.minimum(np.searchsorted(old, new), old.size - 1)
    hit = old[pos] == new
    ids = np.flatnonzero(hit).astype(np.int64)
    return ids, sc[pos[hit]], int(old.size - ids.size)
