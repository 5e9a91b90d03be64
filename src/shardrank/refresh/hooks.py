"""Test hook: stop a refresh at a known point so that a test can kill it there.

Set ``SHARDRANK_TEST_PAUSE`` to one of

* ``build``   - inside the store build, at its first phase once its partial folder holds files;
* ``rank``    - inside the iteration, right after the first checkpoint was written;
* ``publish`` - inside publishing, after the fresh link exists and before it replaces ``current``.

On reaching that point the refresh writes ``HOME/.test-paused`` (holding the phase name) and
sleeps until it is killed. This is for tests only (tests/e2e/test_refresh_*.py); nothing in
normal operation reads the variable. Documented in docs/nightly.md.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

from ..progress import Reporter
from ..store.layout import stale_partials

PAUSE_ENV = "SHARDRANK_TEST_PAUSE"
PAUSE_MARKER = ".test-paused"
PHASES = ("build", "rank", "publish")


class PausePoint:
    """Sleeps forever at the phase named by ``SHARDRANK_TEST_PAUSE`` (unset: does nothing)."""

    def __init__(self, home: Path) -> None:
        self.phase = os.environ.get(PAUSE_ENV) or None
        self.marker = home / PAUSE_MARKER
        self.marker.unlink(missing_ok=True)

    def reached(self, phase: str) -> None:
        if self.phase != phase:
            return
        tmp = self.marker.with_name(self.marker.name + ".partial")
        tmp.write_text(f"{phase} {os.getpid()}\n")
        os.replace(tmp, self.marker)
        while True:  # until the test kills us
            time.sleep(3600)


class PausingReporter(Reporter):
    """Passes everything on to ``inner``; pauses at the build and rank hook points.

    Set ``building`` to the store being built while ``build_store`` runs.
    """

    def __init__(self, inner: Reporter, pause: PausePoint) -> None:
        self.inner = inner
        self.pause = pause
        self.building: Path | None = None

    def event(self, kind: str, message: str, **fields: Any) -> None:
        self.inner.event(kind, message, **fields)
        if kind == "phase" and self.building is not None and self.pause.phase == "build":
            if any(any(p.iterdir()) for p in stale_partials(self.building) if p.is_dir()):
                self.pause.reached("build")
        elif kind == "checkpoint":
            self.pause.reached("rank")

    def progress(
        self, phase: str, done: float, total: float | None, unit: str = "", **fields: Any
    ) -> None:
        self.inner.progress(phase, done, total, unit, **fields)

    def done(self) -> None:
        self.inner.done()
