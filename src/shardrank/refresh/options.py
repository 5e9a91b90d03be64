"""Options of a refresh, validated in one place."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from .. import settings
from ..errors import BadInputError
from ..ingest.build import BuildOptions
from ..solve.options import RankOptions


@dataclass
class RefreshOptions:
    """Options of :func:`refresh`: how to build, how to rank, how many generations to keep,
    and the publishing guards. ``rank.init`` must stay None (the published run is the start)."""

    build: BuildOptions = field(default_factory=BuildOptions)
    rank: RankOptions = field(default_factory=RankOptions)
    keep: int = settings.REFRESH_KEEP
    max_l1: float | None = None
    min_overlap: tuple[int, float] | None = None  # (K, F)

    def validate(self) -> None:
        if not isinstance(self.keep, int) or self.keep < 1:
            raise BadInputError(f"--keep {self.keep} must be at least 1 (the newest generation)")
        if self.max_l1 is not None and not (math.isfinite(self.max_l1) and self.max_l1 >= 0):
            raise BadInputError(
                f"--max-l1 {self.max_l1} must be a number >= 0 (the L1 distance is at most 2)"
            )
        if self.min_overlap is not None:
            k, f = self.min_overlap
            if k < 1 or not 0.0 <= f <= 1.0:
                raise BadInputError(f"--min-overlap {k}:{f}: K must be >= 1 and F between 0 and 1")
        if self.rank.init is not None:
            raise BadInputError(
                "refresh warm-starts from the published run; do not pass --init",
                hint="to seed the first refresh, rank once and publish it, or just let it start cold",
            )
        self.rank.validate()
