"""The self-contained HTML report of a run: facts, options, plots, top keys, comparison."""

from __future__ import annotations

from .render import write_report

__all__ = ["write_report"]
