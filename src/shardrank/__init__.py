"""shardrank: out-of-core PageRank over memory-mapped blocked CSR shards."""

from __future__ import annotations

from .api import (
    BuildOptions,
    RankOptions,
    RankResult,
    RefreshOptions,
    Reporter,
    StoreManifest,
    StoreReader,
    build_store,
    inspect_store,
    open_run,
    open_store,
    patch_store,
    rank,
    refresh,
    resume,
    verify_store,
)
from .errors import (
    BadInputError,
    BusyError,
    DamagedDataError,
    GuardFailedError,
    NotConvergedError,
    ShardrankError,
)

__version__ = "0.1.0"

__all__ = [
    "BadInputError",
    "BuildOptions",
    "BusyError",
    "DamagedDataError",
    "GuardFailedError",
    "NotConvergedError",
    "RankOptions",
    "RankResult",
    "RefreshOptions",
    "Reporter",
    "ShardrankError",
    "StoreManifest",
    "StoreReader",
    "__version__",
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
