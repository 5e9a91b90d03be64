"""Scheduled recomputation: `shardrank refresh` (lock, build, warm rank, validate, publish, prune)."""

from __future__ import annotations

from .options import RefreshOptions
from .refresh import REFRESH_JSON, refresh

__all__ = ["REFRESH_JSON", "RefreshOptions", "refresh"]
