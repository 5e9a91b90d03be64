"""A finished (or stopped) rank run: scores by id and by key, and its summary."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import BadInputError, DamagedDataError
from . import runfiles


class RankResult:
    """Scores of one run. ``scores`` is float64[N] in node-id order (sum 1).

    ``keys`` are the store's node keys in the same order; :meth:`score_of` looks one up.
    """

    def __init__(self, run_dir: Path | None, scores: np.ndarray, keys: pa.Array | None,
                 summary: dict[str, Any]) -> None:
        self.run_dir = run_dir
        self.scores = scores
        self._keys = keys
        self.summary = summary
        self._index: dict[Any, int] | None = None

    # -- summary fields ----------------------------------------------------------------------
    @property
    def iterations(self) -> int:
        return int(self.summary["iterations"])

    @property
    def converged(self) -> bool:
        return bool(self.summary["converged"])

    @property
    def error_bound(self) -> float:
        return float(self.summary["error_bound"])

    @property
    def n_nodes(self) -> int:
        return int(self.scores.shape[0])

    # -- keys ----------------------------------------------------------------------------------
    @property
    def keys(self) -> pa.Array:
        if self._keys is None:
            if self.run_dir is None:
                raise BadInputError("this result has no keys")
            t = pq.read_table(self.run_dir / runfiles.SCORES_PARQUET, columns=["key"])
            self._keys = t.column("key").combine_chunks()
        return self._keys

    def id_of(self, key: Any) -> int:
        idx = pc.index(self.keys, pa.scalar(key, type=self.keys.type)).as_py()
        if idx < 0:
            raise KeyError(key)
        return int(idx)

    def score_of(self, key: Any) -> float:
        """The score of one node, by its key (KeyError if the store has no such key)."""
        return float(self.scores[self.id_of(key)])

    def __getitem__(self, key: Any) -> float:
        return self.score_of(key)

    def top(self, k: int = 10) -> list[tuple[Any, float]]:
        """The k highest scores as (key, score), ties broken by key order (= id order)."""
        from .compare import (
            top_ids,  # argpartition alone may keep any of the nodes tied at the k-th score
        )

        idx = top_ids(self.scores, k)
        keys = self.keys.take(pa.array(idx)).to_pylist()
        return list(zip(keys, self.scores[idx].tolist(), strict=True))

    def __repr__(self) -> str:
        return (f"RankResult(n_nodes={self.n_nodes}, iterations={self.summary.get('iterations')}, "
                f"converged={self.summary.get('converged')}, error_bound={self.summary.get('error_bound')})")


def read_run_json(run: Path) -> dict[str, Any]:
    p = run / runfiles.RUN_JSON
    if not run.exists():
        raise BadInputError(f"{run}: no such run directory", hint="pass the --out directory of `shardrank rank`")
    if not p.is_file():
        raise BadInputError(f"{run}: not a shardrank run (no {runfiles.RUN_JSON})",
                            hint="pass the --out directory of `shardrank rank`")
    try:
        d = json.loads(p.read_text())
    except ValueError as e:
        raise DamagedDataError(f"{p}: not valid JSON ({e})", hint="the run is damaged; rank again") from None
    if not isinstance(d, dict) or d.get("format") != "shardrank-run":
        raise DamagedDataError(f"{p}: not a shardrank run file", hint="rank again into a new directory")
    return d


def open_run(run: str | Path) -> RankResult:
    """Open a finished run directory (scores memory-mapped)."""
    p = Path(run)
    d = read_run_json(p)
    f = p / runfiles.SCORES_NPY
    if d.get("status") not in ("converged", "not-converged") or not f.is_file():
        raise BadInputError(f"{p}: the run has not finished (status {d.get('status')!r})",
                            hint=f"finish it with `shardrank resume {p}`")
    scores = np.load(f, mmap_mode="r", allow_pickle=False)
    if scores.dtype != np.float64 or scores.shape != (d["n_nodes"],):
        raise DamagedDataError(f"{f}: shape or dtype does not match run.json", hint="rank again")
    return RankResult(p, scores, None, d)
