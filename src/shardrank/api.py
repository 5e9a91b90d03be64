"""The typed Python API; the CLI is a thin layer over these functions.

>>> import shardrank
>>> shardrank.build_store(["edges.parquet"], "crawl.store")            # doctest: +SKIP
>>> result = shardrank.rank("crawl.store", "crawl.run")                  # doctest: +SKIP
>>> result.converged, result.error_bound, result.score_of("https://example.org/")  # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from .ingest.build import BuildOptions, build_store
from .ingest.patch import patch_store
from .progress import Reporter
from .refresh import RefreshOptions, refresh
from .results.result import RankResult, open_run
from .solve.options import RankOptions
from .solve.run import rank, resume
from .store.manifest import StoreManifest
from .store.reader import StoreReader
from .store.verify import verify_store


def open_store(path: str | Path, verify: bool = False) -> StoreReader:
    """Open a store memory-mapped. ``verify=True`` also checks every checksum (reads every byte)."""
    return StoreReader.open(path, checksums=verify)


def inspect_store(path: str | Path) -> dict[str, Any]:
    """Facts about a store (see :func:`shardrank.report.facts.store_facts`)."""
    from .results.facts import store_facts

    return store_facts(StoreReader.open(path))


__all__ = [
    "BuildOptions",
    "RankOptions",
    "RankResult",
    "RefreshOptions",
    "Reporter",
    "StoreManifest",
    "StoreReader",
    "build_store",
    "inspect_store",
    "open_run",
    "open_store",
    "patch_store",
    "rank",
    "refresh",
    "resume",
    "verify_store",
]
