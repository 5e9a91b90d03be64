"""The layout of a refresh home: generations of stores and runs, and their pruning.

::

    HOME/
      refresh.lock               the flock (see lock.py)
      current -> runs/gen-000042 the published run (a relative symlink; see publish.py)
      stores/gen-000041/         a store, made by `shardrank build` (atomically, by rename)
      runs/gen-000042/           a run: run.json, scores.*, refresh.json (the summary)

A generation is one refresh's attempt, numbered 1, 2, ...; run gen-N uses store gen-N, or
an older store when the inputs' fingerprint did not change (run.json names the store). A
name in these folders that does not match ``gen-NNNNNN`` (partial builds, folders being
removed) is never taken for a generation.
"""

from __future__ import annotations

import json
import os
import re
import shutil
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from ..results import runfiles
from ..store.atomic import fsync_dir

STORES = "stores"
RUNS = "runs"
CURRENT = "current"
_GEN = re.compile(r"^gen-(\d{6,})$")
_REMOVING = ".removing-"


def gen_name(number: int) -> str:
    """Directory name of generation ``number``."""
    return f"gen-{number:06d}"


def gen_number(name: str) -> int | None:
    """The generation number in a directory name, or None."""
    m = _GEN.match(name)
    return int(m.group(1)) if m else None


@dataclass(frozen=True)
class Generation:
    number: int
    path: Path


def list_generations(folder: Path) -> list[Generation]:
    """Generations in ``folder`` (``HOME/stores`` or ``HOME/runs``), oldest first."""
    if not folder.is_dir():
        return []
    out = [
        Generation(n, p)
        for p in folder.iterdir()
        if p.is_dir() and (n := gen_number(p.name)) is not None
    ]
    return sorted(out, key=lambda g: g.number)


def next_number(home: Path) -> int:
    """One more than the highest generation of stores or runs."""
    nums = [g.number for f in (STORES, RUNS) for g in list_generations(home / f)]
    return max(nums, default=0) + 1


def remove_tree(path: Path) -> None:
    """Remove a directory so that a crash half way leaves no folder that looks like a generation:
    rename it out of the ``gen-*`` namespace first, then delete."""
    doomed = path.with_name(f".{path.name}{_REMOVING}{os.getpid()}")
    os.replace(path, doomed)
    fsync_dir(path.parent)
    shutil.rmtree(doomed, ignore_errors=True)


def clean_leftovers(home: Path) -> list[str]:
    """Remove what interrupted refreshes left: partial store builds, half-removed folders, and
    run folders that never got their run.json. Call with the lock held (no one else writes)."""
    removed: list[str] = []
    for f in (STORES, RUNS):
        folder = home / f
        if not folder.is_dir():
            continue
        for p in folder.iterdir():
            if p.name.startswith(".") and (".partial-" in p.name or _REMOVING in p.name):
                shutil.rmtree(p, ignore_errors=True)
                removed.append(f"{f}/{p.name}")
    for g in list_generations(home / RUNS):
        if not (g.path / runfiles.RUN_JSON).is_file():
            remove_tree(g.path)
            removed.append(f"{RUNS}/{g.path.name}")
    for p in home.glob(".current.new-*"):
        p.unlink(missing_ok=True)
    return removed


def store_of_run(home: Path, run: Path) -> Path | None:
    """The store generation a run in this home used (by name, so a moved HOME still works)."""
    try:
        doc = json.loads((run / runfiles.RUN_JSON).read_text())
        name = Path(doc["store"]["path"]).name
    except (OSError, ValueError, KeyError, TypeError):
        return None
    if gen_number(name) is None:
        return None
    p = home / STORES / name
    return p if p.is_dir() else None


def prune(home: Path, keep: int, protect: Iterable[Path]) -> list[str]:
    """Keep the newest ``keep`` generations (by number, over stores and runs together), the
    ``protect``-ed folders (the published run) and every store a kept run uses; remove the rest.
    Return the removed folders, relative to HOME."""
    runs = list_generations(home / RUNS)
    stores = list_generations(home / STORES)
    numbers = sorted({g.number for g in runs + stores}, reverse=True)
    window = set(numbers[:keep])
    protected = {Path(p).resolve() for p in protect}
    kept_runs = [g for g in runs if g.number in window or g.path.resolve() in protected]
    needed = {s.resolve() for g in kept_runs if (s := store_of_run(home, g.path)) is not None}
    removed: list[str] = []
    for g in runs:
        if g not in kept_runs:
            remove_tree(g.path)
            removed.append(f"{RUNS}/{g.path.name}")
    for g in stores:
        if g.number not in window and g.path.resolve() not in needed | protected:
            remove_tree(g.path)
            removed.append(f"{STORES}/{g.path.name}")
    return removed
