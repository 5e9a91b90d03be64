"""Scheduled recomputation: `shardrank refresh` (lock, build, warm rank, validate, publish, prune)."""

from __future__ import annotations

from .refresh import REFRESH_JSON, RefreshOptions, refresh

__all__ = ["REFRESH_JSON", "RefreshOptions", "refresh"]
