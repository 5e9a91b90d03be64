"""The public surface: one sorted __all__, every name importable, the CLI entry point wired."""

from __future__ import annotations

import shardrank
from shardrank.errors import EXIT_CODES, ShardrankError


def test_all_is_sorted_and_importable() -> None:
    assert shardrank.__all__ == sorted(shardrank.__all__)
    for name in shardrank.__all__:
        assert hasattr(shardrank, name), name


def test_every_error_has_a_documented_exit_code() -> None:
    def subclasses(c: type) -> list[type]:
        return [c] + [s for sub in c.__subclasses__() for s in subclasses(sub)]

    for cls in subclasses(ShardrankError):
        assert cls.exit_code in EXIT_CODES, cls
