"""The iteration driver: chooses each step, measures the error bound, checks invariants,
and calls the checkpoint hook. Engine-agnostic.

Error bound. G is column-stochastic and a contraction by d in L1 on vectors summing to 0, so
for any x with sum 1 and y = G x::

    ||x - x*||_1 <= ||y - x||_1 / (1 - d)    and    ||y - x*||_1 <= d / (1 - d) * ||y - x||_1

The driver returns y renormalised to sum 1; renormalising moves it by |sum(y) - 1| in L1, which
is added to the bound. Only a power step measures ||G x - x||, so only power steps can declare
convergence. The Gauss-Seidel method runs sweeps while their change is large and a verifying
power step when the sweep change suggests the tolerance is reached.
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
    if state.verify_threshold == 0.0:
        state.verify_threshold = tol / gain
    every = opts.checkpoint_every
    last_ckpt = time.monotonic()
    t_start = time.monotonic() - state.iterate_seconds
    while state.iteration < opts.max_iter and not state.converged:
        k = state.iteration + 1
        # the last allowed step always measures, so a run that stops early still has a bound
        power = opts.method == "power" or state.pending_verify or k == opts.max_iter

        def on_block(i: int, n: int, k: int = k) -> None:
            rep.progress(f"iteration {k}", i + 1, n, "blocks")

        if power:
            change = engine.power_step(r, on_block)
        else:
            change = engine.gauss_seidel_sweep(r, on_block)
        total = float(np.sum(r))
        r /= total
        check_invariants(r, k)
        bound = gain * change + abs(total - 1.0) if power else None
        state.iteration = k
        state.residuals.append(change)
        state.bounds.append(bound)
        state.steps.append("power" if power else "gauss-seidel")
        if bound is not None and bound <= tol:
            state.converged, state.error_bound = True, bound
        elif bound is not None:
            state.error_bound = bound
            if opts.method != "power":
                # the sweep change misjudged the bound: wait for a proportionally smaller change
                state.verify_threshold *= max(tol / bound, 1e-3)
                state.pending_verify = False
        else:
            # the verifying power step measures about what the next sweep would change, so judge
            # by this change times the latest contraction ratio (saves a sweep per run)
            prev = state.residuals[-2] if len(state.residuals) > 1 else 0.0
            ratio = min(1.0, change / prev) if prev > 0 else 1.0
            state.pending_verify = change * ratio <= state.verify_threshold
        state.iterate_seconds = time.monotonic() - t_start
        shown = f"{bound:.3e}" if bound is not None else f"~{gain * change:.3e}"
        rep.progress("ranking", k, opts.max_iter, "iterations", bound=shown)
        now = time.monotonic()
        due = (every is not None and k % every == 0) or (every is None and now - last_ckpt >= opts.checkpoint_seconds)
        if checkpoint and due and not state.converged:
            checkpoint(r, state)
            last_ckpt = time.monotonic()
        if interrupted():
            raise KeyboardInterrupt
    return state
