"""Export a run as one table: position, key, score, in_degree, out_degree (Parquet or CSV).

Rows are written highest score first. The run's scores are streamed batch by batch from
``scores.parquet`` into DuckDB, which sorts them (spilling to disk if it must) and writes the
file; the only N-sized arrays in Python are the positions (8 bytes a node, plus the sort).

CSV is meant to be opened in spreadsheets, where a cell that begins with ``=``, ``+``, ``-``
or ``@`` (or a tab or carriage return) is run as a formula. So in CSV only, a string key that
begins with one of those characters, or with an apostrophe, gets one extra apostrophe in
front; every key is quoted. To recover the exact key, drop one leading apostrophe if there is
one. The Parquet export always holds the exact keys; integer keys are never changed.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import BadInputError
from ..store.atomic import fsync_dir
from . import runfiles
from .compare import RunLike, _sql_str, as_result, positions, scratch_duckdb
from .result import RankResult
from .top import open_run_store

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")  # a spreadsheet reads these as a formula
_ESCAPE_STARTS = (*FORMULA_STARTS, "'")  # the apostrophe too, so that escaping is reversible
_BATCH_ROWS = 1 << 18

FORMATS = {".parquet": "parquet", ".csv": "csv", ".csv.gz": "csv.gz"}


def export_format(out: Path) -> str:
    """``parquet``, ``csv`` or ``csv.gz`` from the file name (BadInputError otherwise)."""
    name = out.name.lower()
    for suffix in sorted(FORMATS, key=len, reverse=True):
        if name.endswith(suffix):
            return FORMATS[suffix]
    raise BadInputError(
        f"{out}: cannot tell the format from the name",
        hint="end the file name with .parquet, .csv or .csv.gz",
    )


def spreadsheet_safe(key: Any) -> Any:
    """The CSV form of one key (see the module docstring); non-strings are returned as is."""
    if isinstance(key, str) and key.startswith(_ESCAPE_STARTS):
        return "'" + key
    return key


def _count_escaped(keys: pa.Array) -> int:
    first = pc.utf8_slice_codeunits(keys, 0, 1)
    return int(pc.sum(pc.is_in(first, value_set=pa.array(_ESCAPE_STARTS))).as_py() or 0)


def _batches(
    res: RankResult,
    pos: np.ndarray,
    ind: np.ndarray,
    outd: np.ndarray,
    count: dict[str, int] | None,
) -> Iterator[pa.RecordBatch]:
    if res.run_dir is not None and (res.run_dir / runfiles.SCORES_PARQUET).is_file():
        source = pq.ParquetFile(res.run_dir / runfiles.SCORES_PARQUET).iter_batches(
            batch_size=_BATCH_ROWS, columns=["key", "score"]
        )
    else:
        source = pa.table({"key": res.keys, "score": pa.array(res.scores)}).to_batches(_BATCH_ROWS)
    lo = 0
    for b in source:
        hi = lo + b.num_rows
        if count is not None:
            count["escaped"] += _count_escaped(b.column(0))
        yield pa.RecordBatch.from_arrays(
            [
                pa.array(pos[lo:hi]),
                b.column(0),
                b.column(1),
                pa.array(np.asarray(ind[lo:hi], dtype=np.int64)),
                pa.array(np.asarray(outd[lo:hi], dtype=np.int64)),
            ],
            names=["position", "key", "score", "in_degree", "out_degree"],
        )
        lo = hi
    if lo != pos.shape[0]:
        raise BadInputError(
            f"{res.run_dir}: scores.parquet has {lo:,} rows, the run has {pos.shape[0]:,}",
            hint="the run is damaged; rank again",
        )


def export_run(
    run: RunLike,
    out: str | Path,
    store: str | Path | None = None,
    overwrite: bool = False,
    threads: int | None = None,
) -> dict[str, Any]:
    """Write a run's scores, positions and degrees to ``out`` (.parquet, .csv or .csv.gz).

    Parameters
    ----------
    run
        A run directory or a :class:`RankResult`.
    out
        The file to write; its name picks the format. Written to a sibling ``.partial`` file
        and renamed, so a reader never sees half a file.
    store
        Where the run's store is, if it moved (degrees are read from it).
    overwrite
        Replace ``out`` if it exists.

    Returns
    -------
    dict
        ``{"path", "format", "rows", "escaped_keys"}`` (keys changed for spreadsheets; CSV only).
    """
    out = Path(out)
    fmt = export_format(out)
    if out.exists() and not overwrite:
        raise BadInputError(f"{out}: already exists", hint="pass --overwrite to replace it")
    if not out.parent.is_dir():
        raise BadInputError(f"{out.parent}: no such directory", hint="create it first")
    res = as_result(run)
    reader = open_run_store(res, store)
    pos = positions(res.scores)
    schema = pa.schema(
        [
            ("position", pa.int64()),
            ("key", res.keys.type),
            ("score", pa.float64()),
            ("in_degree", pa.int64()),
            ("out_degree", pa.int64()),
        ]
    )
    string_keys = pa.types.is_string(res.keys.type) or pa.types.is_large_string(res.keys.type)
    count = {"escaped": 0} if fmt != "parquet" and string_keys else None
    stream = pa.RecordBatchReader.from_batches(
        schema, _batches(res, pos, reader.in_degree(), reader.out_degree(), count)
    )
    part = out.with_name(out.name + ".partial")
    with scratch_duckdb(threads) as con:
        con.register("rows", stream)
        if fmt == "parquet":
            key_sql = "key"
            opts = "FORMAT parquet, COMPRESSION zstd"
        else:
            starts = ", ".join(_sql_str(c) for c in _ESCAPE_STARTS)
            key_sql = (
                f"CASE WHEN left(key, 1) IN ({starts}) THEN '''' || key ELSE key END"
                if string_keys
                else "key"
            )
            opts = "FORMAT csv, HEADER true, FORCE_QUOTE (key)"
            if fmt == "csv.gz":
                opts += ", COMPRESSION gzip"
        con.execute(
            f"COPY (SELECT position, {key_sql} AS key, score, in_degree, out_degree "
            f"FROM rows ORDER BY position) TO {_sql_str(str(part))} ({opts})"
        )
    with open(part, "rb+") as f:
        os.fsync(f.fileno())
    os.replace(part, out)
    fsync_dir(out.parent)
    return {
        "path": str(out),
        "format": fmt,
        "rows": int(pos.shape[0]),
        "escaped_keys": count["escaped"] if count else 0,
    }
