"""Checkpoints of a run: the score vector and the iteration state, written atomically.

    RUN/checkpoints/iter-000120/scores.npy    float64[N]
    RUN/checkpoints/iter-000120/state.json    written last; holds the checksum of scores.npy

A checkpoint directory is built under a temporary name and renamed into place; the newest
``settings.CHECKPOINTS_KEPT`` are kept. Loading falls back to an older checkpoint when the
newest does not verify.
"""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .. import settings
from ..store.atomic import fsync_dir, sha256_file, write_json_atomic, write_npy_atomic

CKPT_DIR = "checkpoints"


@dataclass
class IterState:
    """Everything the driver needs to continue bit for bit (besides the score vector)."""

    iteration: int = 0
    residuals: list[float] = field(default_factory=list)  # the measured L1 change per iteration
    bounds: list[float | None] = field(default_factory=list)  # guaranteed bound per iteration
    steps: list[str] = field(default_factory=list)  # "power" | "gauss-seidel"
    converged: bool = False
    error_bound: float | None = None
    iterate_seconds: float = 0.0

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> IterState:
        return cls(**{k: d[k] for k in cls.__dataclass_fields__ if k in d})


def _ckpt_dirs(run: Path) -> list[Path]:
    root = run / CKPT_DIR
    if not root.is_dir():
        return []
    return sorted((p for p in root.iterdir() if p.is_dir() and p.name.startswith("iter-")), reverse=True)


def write_checkpoint(run: Path, r: np.ndarray, state: IterState, meta: dict[str, Any]) -> Path:
    root = run / CKPT_DIR
    root.mkdir(parents=True, exist_ok=True)
    final = root / f"iter-{state.iteration:06d}"
    tmp = root / f".iter-{state.iteration:06d}.partial-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    n_bytes, sha = write_npy_atomic(tmp / "scores.npy", r)
    write_json_atomic(tmp / "state.json", {"scores": {"bytes": n_bytes, "sha256": sha}, "meta": meta,
                                           "state": asdict(state)})
    fsync_dir(tmp)
    if final.exists():
        shutil.rmtree(final)
    os.replace(tmp, final)
    fsync_dir(root)
    for old in _ckpt_dirs(run)[settings.CHECKPOINTS_KEPT:]:
        shutil.rmtree(old, ignore_errors=True)
    for stale in root.glob(".iter-*.partial-*"):
        if stale != tmp:
            shutil.rmtree(stale, ignore_errors=True)
    return final


def load_checkpoint(run: Path, n_nodes: int, problems: list[str] | None = None,
                    ) -> tuple[np.ndarray, IterState, dict[str, Any], list[str]] | None:
    """The newest checkpoint that verifies: (scores, state, meta, problems with newer ones).

    ``problems`` (if given) also receives why each skipped checkpoint failed, so that they can
    be reported when none verifies and None is returned.
    """
    problems = [] if problems is None else problems
    for d in _ckpt_dirs(run):
        try:
            info = json.loads((d / "state.json").read_text())
            f = d / "scores.npy"
            if f.stat().st_size != info["scores"]["bytes"] or sha256_file(f) != info["scores"]["sha256"]:
                raise ValueError("scores.npy does not match its checksum")
            r = np.load(f, allow_pickle=False)
            if r.dtype != np.float64 or r.shape != (n_nodes,):
                raise ValueError(f"scores have shape {r.shape}, store has {n_nodes} nodes")
            return np.array(r), IterState.from_json(info["state"]), info["meta"], problems
        except (OSError, ValueError, KeyError, TypeError) as e:
            problems.append(f"{d.name}: {e}")
    return None
