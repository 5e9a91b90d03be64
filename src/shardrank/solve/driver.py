"""The iteration driver: runs steps, measures the error bound, checks invariants, and calls
the checkpoint hook. Engine-agnostic.

Error bound. G is column-stochastic and, on vectors summing to 0, a contraction by d in L1, so
for any x with sum 1::

    ||x - x*||_1 <= ||G x - x||_1 / (1 - d)

Every step, power or Gauss-Seidel, certifies its own output. A step reads a vector x (sum 1)
and writes z (sum sigma, not renormalised yet); each row j of z is computed as row j of G'
applied to a vector u_j whose entries are either x_i (not yet recomputed) or z_i (fresh), where
G' u = d P u + d (dead-end mass of u) v + (1 - d) v. A power step has u_j = x for all j. So
(G' z - z)_j = row j of G'_lin applied to (z - u_j), whose entries are 0 or z_i - x_i, and
since every column of G'_lin = d P + d v a^T sums to at most d::

    ||G' z - z||_1 <= d ||z - x||_1 = d * change

Renormalising, x' = z / sigma: G x' - x' = ((G' z - z) + (1 - d)(sigma - 1) v) / sigma, hence::

    ||x' - x*||_1 <= (d / (1 - d) * change + |sigma - 1|) / sigma

which the driver records as the step's bound and stops on. For a power step sigma is 1 up to
rounding and this is the familiar d / (1 - d) * ||G x - x||_1.
"""

from __future__ import annotations

import math
import signal
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager

import numpy as np

from .. import settings
from ..errors import DamagedDataError
from ..progress import Reporter
from .checkpoint import IterState
from .engine import Engine
from .options import RankOptions

CheckpointHook = Callable[[np.ndarray, IterState], None]


def check_invariants(r: np.ndarray, iteration: int) -> float:
    """Scores finite and non-negative, mass 1 within settings.MASS_TOLERANCE; return the mass."""
    total = float(np.sum(r))
    low = float(r.min())
    # a NaN or inf score makes the sum (or the minimum) non-finite: no N-sized mask needed
    if not (math.isfinite(total) and math.isfinite(low)):
        raise DamagedDataError(f"iteration {iteration}: non-finite scores (NaN or inf)",
                               hint="the store's out-weights or shards are inconsistent; run `shardrank verify`")
    if low < 0.0:
        raise DamagedDataError(f"iteration {iteration}: negative scores",
                               hint="the store's out-weights or shards are inconsistent; run `shardrank verify`")
    if abs(total - 1.0) > settings.MASS_TOLERANCE:
        raise DamagedDataError(f"iteration {iteration}: total score {total!r} is not 1",
                               hint="the store's out-weights or shards are inconsistent; run `shardrank verify`")
    return total


@contextmanager
def _ctrl_c_between_steps() -> Iterator[Callable[[], bool]]:
    """Hold Ctrl-C (SIGINT) to the end of the current iteration; yield "was it pressed?".

    A step updates ``r`` in place, block by block: a KeyboardInterrupt in the middle would
    leave it half updated, and the checkpoint written on the way out would then be no iterate
    at all (the resumed run would differ from an uninterrupted one). Only in the main thread
    with Python's own SIGINT handler; elsewhere Ctrl-C acts at once as usual.
    """
    held: list[int] = []
    if (threading.current_thread() is not threading.main_thread()
            or signal.getsignal(signal.SIGINT) is not signal.default_int_handler):
        yield lambda: False
        return
    signal.signal(signal.SIGINT, lambda signum, frame: held.append(signum))
    try:
        yield lambda: bool(held)
    finally:
        signal.signal(signal.SIGINT, signal.default_int_handler)


def iterate(
    engine: Engine, r: np.ndarray, state: IterState, opts: RankOptions, rep: Reporter,
    checkpoint: CheckpointHook | None = None,
) -> IterState:
    """Run steps until the guaranteed bound is <= tol or max_iter; ``r`` is updated in place.

    Ctrl-C raises KeyboardInterrupt at the end of an iteration, when ``r`` and ``state`` agree.
    """
    with _ctrl_c_between_steps() as interrupted:
        return _iterate(engine, r, state, opts, rep, checkpoint, interrupted)


def _iterate(
    engine: Engine, r: np.ndarray, state: IterState, opts: RankOptions, rep: Reporter,
    checkpoint: CheckpointHook | None, interrupted: Callable[[], bool],
) -> IterState:
    d, tol = opts.damping, opts.tol
    gain = d / (1.0 - d)
    every = opts.checkpoint_every
    last_ckpt = time.monotonic()
    t_start = time.monotonic() - state.iterate_seconds
    while state.iteration < opts.max_iter and not state.converged:
        k = state.iteration + 1
        power = opts.method == "power"

        def on_block(i: int, n: int, k: int = k) -> None:
            rep.progress(f"iteration {k}", i + 1, n, "blocks")

        if power:
            change = engine.power_step(r, on_block)
        else:
            change = engine.gauss_seidel_sweep(r, on_block)
        total = float(np.sum(r))
        r /= total
        check_invariants(r, k)
        bound = (gain * change + abs(total - 1.0)) / total
        state.iteration = k
        state.residuals.append(change)
        state.bounds.append(bound)
        state.steps.append("power" if power else "gauss-seidel")
        state.error_bound = bound
        if bound <= tol:
            state.converged = True
        state.iterate_seconds = time.monotonic() - t_start
        rep.progress("ranking", k, opts.max_iter, "iterations", bound=f"{bound:.3e}")
        now = time.monotonic()
        due = (every is not None and k % every == 0) or (every is None and now - last_ckpt >= opts.checkpoint_seconds)
        if checkpoint and due and not state.converged:
            checkpoint(r, state)
            last_ckpt = time.monotonic()
        if interrupted():
            raise KeyboardInterrupt
    return state
