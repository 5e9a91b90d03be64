"""Progress and event reporting: a terminal line, plain log lines, JSON lines, or nothing.

Library code calls a :class:`Reporter`; the CLI chooses which one. Reporters write to stderr
so that stdout stays clean for results (tables, JSON).
"""

from __future__ import annotations

import json
import sys
import time
from typing import IO, Any

from . import settings


def _fmt_secs(s: float) -> str:
    s = int(max(0, s))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}" if s >= 3600 else f"{s // 60}:{s % 60:02d}"


class Reporter:
    """Silent base reporter (also the default for the Python API)."""

    def event(self, kind: str, message: str, **fields: Any) -> None:
        """A one-off fact: a phase started, a checkpoint was written, a warning."""

    def progress(self, phase: str, done: float, total: float | None, unit: str = "", **fields: Any) -> None:
        """Advance a long phase; ``total`` None when unknown."""

    def done(self) -> None:
        """Finish any line in progress."""


class TextReporter(Reporter):
    """Human-readable: a redrawn status line on a terminal, occasional lines otherwise."""

    def __init__(self, stream: IO[str] | None = None) -> None:
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty()
        self._last = 0.0
        self._phase_start: dict[str, float] = {}
        self._open_line = False

    def _clear(self) -> None:
        if self._open_line:
            self.stream.write("\r\x1b[2K")
            self._open_line = False

    def event(self, kind: str, message: str, **fields: Any) -> None:
        self._clear()
        prefix = "warning: " if kind == "warning" else ""
        self.stream.write(f"{prefix}{message}\n")
        self.stream.flush()

    def progress(self, phase: str, done: float, total: float | None, unit: str = "", **fields: Any) -> None:
        now = time.monotonic()
        start = self._phase_start.setdefault(phase, now)
        interval = settings.PROGRESS_INTERVAL if self.tty else settings.PROGRESS_LOG_INTERVAL
        finished = total is not None and done >= total
        if now - self._last < interval and not (finished and self.tty):
            return
        self._last = now
        elapsed = now - start
        if total:
            pct = 100.0 * done / total
            eta = f", eta {_fmt_secs(elapsed * (total - done) / done)}" if 0 < done < total else ""
            txt = f"{phase}: {done:,.0f}/{total:,.0f} {unit} ({pct:.0f}%, {_fmt_secs(elapsed)}{eta})"
        else:
            txt = f"{phase}: {done:,.0f} {unit} ({_fmt_secs(elapsed)})"
        extra = " ".join(f"{k}={v}" for k, v in fields.items())
        if extra:
            txt += f" {extra}"
        if self.tty:
            self.stream.write("\r\x1b[2K" + txt[:200])
            self._open_line = True
        else:
            self.stream.write(txt + "\n")
        self.stream.flush()

    def done(self) -> None:
        if self._open_line:
            self.stream.write("\n")
            self._open_line = False
        self.stream.flush()


class JsonReporter(Reporter):
    """One JSON object a line on stderr, for schedulers and log collectors."""

    def __init__(self, stream: IO[str] | None = None) -> None:
        self.stream = stream or sys.stderr
        self._last = 0.0

    def _emit(self, obj: dict[str, Any]) -> None:
        obj = {"time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), **obj}
        self.stream.write(json.dumps(obj, default=str) + "\n")
        self.stream.flush()

    def event(self, kind: str, message: str, **fields: Any) -> None:
        self._emit({"event": kind, "message": message, **fields})

    def progress(self, phase: str, done: float, total: float | None, unit: str = "", **fields: Any) -> None:
        now = time.monotonic()
        if now - self._last < settings.PROGRESS_LOG_INTERVAL and not (total and done >= total):
            return
        self._last = now
        self._emit({"event": "progress", "phase": phase, "done": done, "total": total, "unit": unit, **fields})
