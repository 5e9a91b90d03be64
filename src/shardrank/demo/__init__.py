"""The demo: an invented web crawl, built, ranked twice and summarised."""

from .run import run_demo

__all__ = ["run_demo"]
