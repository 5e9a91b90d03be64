"""The delta of a patch: reading its edge tables, and the keys and pairs it names.

A delta side is an edge table read like a build input (Parquet or CSV, validated by
``tables.py``). Its keys become indices into the delta's own sorted distinct keys; pairs are
packed ``dst << 32 | src`` into one uint64, so a sort orders them by destination, then source
(patches handle fewer than 2^32 nodes). ``patch.py`` looks them up in the old store.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import BadInputError
from ..store.manifest import StoreManifest
from .sources import InputFile, resolve_inputs
from .tables import (
    arrow_table,
    check_same_key_types,
    choose_columns,
    describe,
    scan_sql,
    sniff_text,
    sql_ident,
)

_LOW = np.uint64(0xFFFFFFFF)


def split_pairs(packed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(dst, src) as int64 from packed ``dst << 32 | src``."""
    return (packed >> np.uint64(32)).astype(np.int64), (packed & _LOW).astype(np.int64)


def pack_pairs(dst: np.ndarray, src: np.ndarray) -> np.ndarray:
    return (dst.astype(np.uint64) << np.uint64(32)) | src.astype(np.uint64)


# -- reading the delta -----------------------------------------------------------------------------
def _read_side(
    con: duckdb.DuckDBPyConnection,
    files: list[InputFile],
    m: StoreManifest,
    src: str,
    dst: str,
    header: str,
) -> pa.Table:
    """The (s, d) key columns of one side of the delta, validated like build inputs."""
    where = str(files[0].path) if len(files) == 1 else f"delta files ({files[0].path}, ...)"
    files = sniff_text(con, files, header, [src, dst])
    cols = choose_columns(describe(con, files), where, src, dst, None)
    check_same_key_types(con, files, cols)
    if cols.key_type != m.key_type:
        kind = {"int64": "integer", "string": "text"}
        raise BadInputError(
            f"{where}: {kind[cols.key_type]} keys, but the store has {kind[m.key_type]} keys",
            hint="a delta must use the store's key type (cast the key columns)",
        )
    key_sql = "BIGINT" if m.key_type == "int64" else "VARCHAR"
    sql = (
        f"SELECT CAST({sql_ident(cols.src)} AS {key_sql}) AS s, "
        f"CAST({sql_ident(cols.dst)} AS {key_sql}) AS d FROM {scan_sql(files)}"
    )
    try:
        t = arrow_table(con, sql)
    except duckdb.Error as e:
        raise BadInputError(
            f"{where}: cannot be read ({str(e).splitlines()[0]})",
            hint="check that every delta file is complete and holds keys of one type",
        ) from None
    for name, col in (("s", cols.src), ("d", cols.dst)):
        if t.column(name).null_count:
            # name the first file holding a null key in this column
            bad = next(
                (
                    f
                    for f in files
                    if con.execute(
                        f"SELECT count(*) FROM {scan_sql([f])} WHERE {sql_ident(col)} IS NULL"
                    ).fetchall()[0][0]
                ),
                files[0],
            )
            raise BadInputError(
                f"{bad.path}: {t.column(name).null_count:,} rows have a null '{col}'",
                hint="a delta edge needs both keys: remove those rows from the delta",
            )
    return t


def read_delta(
    paths: Sequence[str | os.PathLike[str]],
    m: StoreManifest,
    src: str,
    dst: str,
    header: str,
    threads: int | None,
) -> tuple[list[InputFile], pa.Table]:
    if not paths:
        empty = pa.array([], type=pa.int64() if m.key_type == "int64" else pa.string())
        return [], pa.table({"s": empty, "d": empty})
    files = resolve_inputs([str(p) for p in paths])
    con = duckdb.connect()
    try:
        if threads:
            con.execute(f"SET threads = {int(threads)}")
        return files, _read_side(con, files, m, src, dst, header)
    finally:
        con.close()


# -- keys ------------------------------------------------------------------------------------------
def as_keys(a: pa.ChunkedArray | pa.Array, key_type: str) -> Any:
    """Keys as a searchable array: int64 numpy for integer keys, an Arrow string array else."""
    if isinstance(a, pa.ChunkedArray):
        a = a.combine_chunks()
    if key_type == "int64":
        return np.asarray(a.to_numpy(zero_copy_only=False), dtype=np.int64)
    return a.cast(pa.large_string())


def count_below(sorted_keys: Any, q: Any, key_type: str) -> np.ndarray:
    """For each key of ``q``, how many of ``sorted_keys`` are smaller (a batched binary search;
    Arrow compares strings byte by byte, the order of a build's ids)."""
    if key_type == "int64":
        return np.searchsorted(sorted_keys, q, side="left").astype(np.int64)
    lo = np.zeros(len(q), dtype=np.int64)
    hi = np.full(len(q), len(sorted_keys), dtype=np.int64)
    while True:
        act = np.flatnonzero(lo < hi)
        if act.size == 0:
            return lo
        mid = (lo[act] + hi[act]) // 2
        less = pc.less(pc.take(sorted_keys, pa.array(mid)), pc.take(q, pa.array(act)))
        lt = np.asarray(less.to_numpy(zero_copy_only=False), dtype=bool)
        lo[act] = np.where(lt, mid + 1, lo[act])
        hi[act] = np.where(lt, hi[act], mid)


def equal_at(sorted_keys: Any, pos: np.ndarray, q: Any, key_type: str) -> np.ndarray:
    """Whether ``sorted_keys[pos[i]] == q[i]`` (False where ``pos`` is past the end)."""
    ok = pos < len(sorted_keys)
    idx = np.flatnonzero(ok)
    if key_type == "int64":
        ok[idx] = sorted_keys[pos[idx]] == q[idx]
    elif idx.size:
        eq = pc.equal(pc.take(sorted_keys, pa.array(pos[idx])), pc.take(q, pa.array(idx)))
        ok[idx] = np.asarray(eq.to_numpy(zero_copy_only=False), dtype=bool)
    return ok


def unique_keys(t_add: pa.Table, t_rem: pa.Table, key_type: str) -> tuple[Any, list[np.ndarray]]:
    """The delta's distinct keys, sorted, and each key column as indices into them."""
    cols = [t.column(c) for t in (t_add, t_rem) for c in ("s", "d")]
    if key_type == "int64":
        arrs = [as_keys(c, key_type) for c in cols]
        allk = np.concatenate(arrs)
        # any order of equal keys gives them the same rank: the unstable sort (0.2 s on the
        # 5.2 M keys of a 1 % delta at scale 23, against 0.5 - 1.0 s for kind="stable")
        order = np.argsort(allk)
        srt = allk[order]
        first = np.ones(srt.shape[0], dtype=bool)
        first[1:] = srt[1:] != srt[:-1]
        inv = np.empty(srt.shape[0], dtype=np.int64)
        inv[order] = np.cumsum(first) - 1  # the rank of each key among the distinct keys
        bounds = np.cumsum([0] + [x.shape[0] for x in arrs])
        return srt[first], [inv[bounds[i] : bounds[i + 1]] for i in range(4)]
    allk = pa.concat_arrays([as_keys(c, key_type) for c in cols])
    uniq = pc.unique(allk)
    uniq = pc.take(uniq, pc.sort_indices(uniq))
    return uniq, [
        np.asarray(pc.index_in(as_keys(c, key_type), value_set=uniq), dtype=np.int64) for c in cols
    ]


def sorted_unique(a: np.ndarray) -> np.ndarray:
    """np.unique by sorting: on 5.2 M int64 keys 0.09 s against 5.5 s for np.unique (numpy
    2.4, whose hash path is slow here; measured on this machine)."""
    a = np.sort(a)
    keep = np.ones(a.shape[0], dtype=bool)
    keep[1:] = a[1:] != a[:-1]
    return a[keep]


def distinct_pairs(d: np.ndarray, s: np.ndarray) -> np.ndarray:
    return sorted_unique(pack_pairs(d, s))
