"""Options of a rank run, validated in one place."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

from .. import settings
from ..errors import BadInputError

METHODS = ("power", "gauss-seidel")
DEAD_END_POLICIES = ("teleport", "uniform")


@dataclass
class RankOptions:
    """What to compute and how. Options that change the answer are in :meth:`answer_options`."""

    damping: float = settings.DAMPING
    tol: float = settings.TOL
    max_iter: int = settings.MAX_ITER
    method: str = settings.METHOD
    dead_ends: str = settings.DEAD_ENDS
    teleport: str | None = None  # path of a (key, weight) table
    ignore_unknown_keys: bool = False
    init: str | None = None  # a run directory or a (key, score) table
    threads: int | None = None
    checkpoint_every: int | None = None  # iterations
    checkpoint_seconds: float = settings.CHECKPOINT_SECONDS
    engine: str = "local"  # a name in solve.engine.ENGINES
    scheduler: str | None = None  # dask engine: address of a running scheduler (tcp://HOST:PORT)
    workers: int | None = None  # dask engine without a scheduler: local worker processes
    exchange: str | None = None  # dask engine: shared directory or URL for per-step vectors

    def validate(self) -> None:
        d = self.damping
        if not isinstance(d, (int, float)) or math.isnan(d) or not 0.0 < d < 1.0:
            raise BadInputError(
                f"--damping {d} is outside the valid range 0 < d < 1",
                hint="the usual value is 0.85; 0.8-0.9 is the common range (up to 0.99 works, slower)",
            )
        t = self.tol
        if not isinstance(t, (int, float)) or math.isnan(t) or not t > 0:
            raise BadInputError(f"--tol {t} must be a positive number",
                                hint="e.g. 1e-9: the L1 distance to the exact answer is at most tol")
        if not isinstance(self.max_iter, int) or self.max_iter < 1:
            raise BadInputError(f"--max-iter {self.max_iter} must be a positive integer")
        if self.method not in METHODS:
            raise BadInputError(f"--method {self.method!r} is not one of {', '.join(METHODS)}")
        if self.dead_ends not in DEAD_END_POLICIES:
            raise BadInputError(f"--dead-ends {self.dead_ends!r} is not one of {', '.join(DEAD_END_POLICIES)}")
        if self.threads is not None and self.threads < 1:
            raise BadInputError("--threads must be at least 1")
        if self.checkpoint_every is not None and self.checkpoint_every < 1:
            raise BadInputError("--checkpoint-every must be at least 1 iteration")
        if not self.checkpoint_seconds > 0:
            raise BadInputError("--checkpoint-seconds must be positive")
        if self.workers is not None and self.workers < 1:
            raise BadInputError("--workers must be at least 1")
        if self.scheduler and self.workers:
            raise BadInputError("--workers starts local workers; it does not go with --scheduler",
                                hint="size a remote cluster with `dask worker --nworkers N`")
        if self.engine != "dask" and (self.scheduler or self.workers or self.exchange):
            raise BadInputError("--scheduler, --workers and --exchange apply to --engine dask only",
                                hint="add --engine dask")

    def answer_options(self) -> dict[str, Any]:
        """The options that determine the iterates bit for bit (checked on resume)."""
        return {k: v for k, v in asdict(self).items()
                if k in ("damping", "tol", "max_iter", "method", "dead_ends")}

    def to_json(self) -> dict[str, Any]:
        return asdict(self)
