"""The highest scores of a run, optionally among keys that match a pattern, with degrees.

A row is ``{position, key, score, score_x_n, in_degree, out_degree}``: position 1 is the
highest score of the whole run (ties ordered by key, which is also id order), ``score_x_n``
is the score in units of the uniform share 1/N, and the degrees come from the run's store.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from .. import settings
from ..errors import BadInputError
from ..store.reader import StoreReader
from . import runfiles
from .compare import (
    RunLike,
    _sql_str,
    as_result,
    fetch_arrow,
    keys_of,
    positions_of,
    scratch_duckdb,
    top_ids,
)
from .result import RankResult


def open_run_store(res: RankResult, store: str | Path | None = None) -> StoreReader:
    """The store a run was computed on: ``store`` if given, else the path in ``run.json``.

    Raises :class:`BadInputError` when the store is missing or is not the one the run used.
    """
    doc = res.summary.get("store") or {}
    path = Path(store) if store is not None else Path(doc.get("path", ""))
    if not path.is_dir():
        raise BadInputError(
            f"{path}: the run's store is not there (moved or deleted?)",
            hint="pass --store with the store's new location",
        )
    reader = StoreReader.open(path)
    want = doc.get("fingerprint")
    if want and reader.fingerprint != want:
        raise BadInputError(
            f"{path}: not the store this run was computed on (fingerprint differs)",
            hint="pass --store with the store the run used",
        )
    if reader.n_nodes != res.n_nodes:
        raise BadInputError(
            f"{path}: {reader.n_nodes:,} nodes but the run has {res.n_nodes:,}",
            hint="pass --store with the store the run used",
        )
    return reader


def _glob(pattern: str) -> str:
    """A pattern without wildcards matches as a substring."""
    return pattern if any(c in pattern for c in "*?[") else f"*{pattern}*"


def _matching(res: RankResult, pattern: str, k: int) -> tuple[np.ndarray, list[Any]]:
    """Ids and keys of the k highest-scored keys that match ``pattern`` (DuckDB GLOB)."""
    with scratch_duckdb() as con:
        if res.run_dir is not None and (res.run_dir / runfiles.SCORES_PARQUET).is_file():
            src = (
                f"read_parquet({_sql_str(str(res.run_dir / runfiles.SCORES_PARQUET))}, "
                "file_row_number = true)"
            )
            idcol = "file_row_number"
        else:
            con.register(
                "mem",
                pa.table(
                    {
                        "key": res.keys,
                        "score": pa.array(res.scores),
                        "id": pa.array(np.arange(res.n_nodes)),
                    }
                ),
            )
            src, idcol = "mem", "id"
        t = fetch_arrow(
            con,
            f"SELECT {idcol} AS id, key FROM {src} "
            f"WHERE CAST(key AS VARCHAR) GLOB {_sql_str(_glob(pattern))} "
            f"ORDER BY score DESC, key LIMIT {int(k)}",
        )
    return np.asarray(t.column("id").to_numpy(), dtype=np.int64), t.column("key").to_pylist()


def top_rows(
    run: RunLike,
    k: int = settings.TOP_K,
    match: str | None = None,
    store: str | Path | None = None,
    degrees: bool = True,
) -> list[dict[str, Any]]:
    """The k highest-scored nodes of a run (among keys matching ``match`` if given).

    Parameters
    ----------
    run
        A run directory or a :class:`RankResult`.
    k
        How many rows (at most N).
    match
        A glob pattern on the key (``*`` any text, ``?`` one character, ``[abc]`` a set;
        case-sensitive); a pattern without wildcards matches anywhere in the key.
    store
        Where the run's store is, if it moved (degrees are read from it).
    degrees
        False to skip the store (``in_degree`` and ``out_degree`` are then absent).

    Returns
    -------
    list of dict
        ``position, key, score, score_x_n, in_degree, out_degree``, highest score first.
    """
    if k < 1:
        raise BadInputError(
            f"-k must be at least 1 (got {k})", hint="pass -k 25 or another positive number"
        )
    res = as_result(run)
    scores = res.scores
    n = res.n_nodes
    if match is None:
        k = min(k, n)
        ids = top_ids(scores, k)
        keys = keys_of(res, ids)
        pos = np.arange(1, ids.size + 1, dtype=np.int64)
    else:
        ids, keys = _matching(res, match, k)
        pos = positions_of(scores, ids)
    rows: list[dict[str, Any]] = [
        {
            "position": int(p),
            "key": key,
            "score": float(scores[i]),
            "score_x_n": float(scores[i]) * n,
        }
        for p, key, i in zip(pos.tolist(), keys, ids.tolist(), strict=True)
    ]
    if degrees and rows:
        reader = open_run_store(res, store)
        ind, outd = reader.in_degree(), reader.out_degree()
        for r, i in zip(rows, ids.tolist(), strict=True):
            r["in_degree"] = int(ind[i])
            r["out_degree"] = int(outd[i])
    return rows
