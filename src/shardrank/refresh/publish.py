"""Publishing: ``HOME/current`` is a symlink to the published run, replaced atomically.

A fresh link is made under a temporary name and renamed over ``current`` (rename(2) replaces
the old link in one step), then the directory is fsynced. A reader that opens
``HOME/current/scores.parquet`` resolves the link once and gets either the old run or the
new one, both complete: a run's files are all written (and fsynced) before it is published.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

from ..errors import BadInputError
from ..store.atomic import fsync_dir
from .generations import CURRENT


def published_run(home: Path) -> Path | None:
    """The run ``HOME/current`` points at, or None when nothing is published yet."""
    link = home / CURRENT
    if not link.is_symlink():
        if link.exists():
            raise BadInputError(
                f"{link} is not a symlink (refresh publishes by replacing a symlink)",
                hint=f"move {link} away; refresh will recreate it",
            )
        return None
    target = (home / os.readlink(link)).resolve()
    return target if target.is_dir() else None


def publish(home: Path, run: Path, before_swap: Callable[[], None] | None = None) -> None:
    """Point ``HOME/current`` at ``run`` (inside HOME) atomically; ``before_swap`` is a test hook."""
    link = home / CURRENT
    if link.exists() and not link.is_symlink():
        raise BadInputError(
            f"{link} is not a symlink (refresh publishes by replacing a symlink)",
            hint=f"move {link} away; refresh will recreate it",
        )
    fresh = home / f".{CURRENT}.new-{os.getpid()}"
    fresh.unlink(missing_ok=True)
    os.symlink(os.path.relpath(run.resolve(), home.resolve()), fresh)
    if before_swap:
        before_swap()
    os.replace(fresh, link)
    fsync_dir(home)
