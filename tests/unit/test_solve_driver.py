"""The iteration driver with a small dense engine: step choice, bound, invariants, Ctrl-C."""

from __future__ import annotations

import os
import signal
import threading

import numpy as np
import pytest

from shardrank.errors import DamagedDataError
from shardrank.progress import Reporter
from shardrank.solve.checkpoint import IterState
from shardrank.solve.driver import check_invariants, iterate
from shardrank.solve.options import RankOptions


class DenseEngine:
    """G = d S + (1 - d) v 1^T as a dense matrix (S column-stochastic, dead ends patched with
    v). A sweep is a block Gauss-Seidel sweep like the local engine's: blocks of ``block`` rows
    in order, each computed as d S u + (1 - d) v from the vector u as it stands (fresh for the
    blocks before it), written in place without renormalising."""

    name = "dense"

    def __init__(
        self, n: int = 6, d: float = 0.85, seed: int = 0, ctrl_c_at_step: int | None = None,
        block: int = 2,
    ) -> None:
        rng = np.random.default_rng(seed)
        s = rng.uniform(0, 1, (n, n)) * (rng.uniform(0, 1, (n, n)) < 0.5)
        s[:, 0] = 0.0  # a dead end ...
        v = np.full(n, 1.0 / n)
        s[:, s.sum(axis=0) == 0] = v[:, None]  # ... (and any other) patched with the teleport
        s /= s.sum(axis=0)
        self.g = d * s + (1 - d) * np.outer(v, np.ones(n))
        self.ds, self.tv, self.block = d * s, (1 - d) * v, block
        self.steps = 0
        self.ctrl_c_at_step = ctrl_c_at_step
        self.finished_steps = 0

    def power_step(self, r: np.ndarray, on_block: object = None) -> float:
        self.steps += 1
        y = self.g @ r
        half = r.size // 2
        change = float(np.abs(y - r).sum())
        r[:half] = y[:half]
        if self.steps == self.ctrl_c_at_step:
            os.kill(os.getpid(), signal.SIGINT)  # Ctrl-C half way through the update of r
        r[half:] = y[half:]
        self.finished_steps += 1
        return change

    def gauss_seidel_sweep(self, r: np.ndarray, on_block: object = None) -> float:
        change = 0.0
        for a in range(0, r.size, self.block):
            b = min(a + self.block, r.size)
            z = self.ds[a:b] @ r + self.tv[a:b]
            change += float(np.abs(z - r[a:b]).sum())
            r[a:b] = z
        return change

    def close(self) -> None:
        pass


def _exact(engine: DenseEngine) -> np.ndarray:
    w, vec = np.linalg.eig(engine.g)
    x = np.real(vec[:, np.argmin(np.abs(w - 1))])
    return x / x.sum()


@pytest.mark.skipif(
    signal.getsignal(signal.SIGINT) is not signal.default_int_handler,
    reason="needs Python's own SIGINT handler",
)
def test_ctrl_c_inside_a_step_waits_for_the_end_of_the_iteration() -> None:
    eng = DenseEngine(ctrl_c_at_step=3)
    n = eng.g.shape[0]
    r = np.full(n, 1.0 / n)
    saved: list[tuple[np.ndarray, int]] = []
    state = IterState()
    with pytest.raises(KeyboardInterrupt):
        iterate(
            eng,
            r,
            state,
            RankOptions(method="power", tol=1e-14),
            Reporter(),
            lambda vec, st: saved.append((vec.copy(), st.iteration)),
        )
    # the interrupted step ran to its end, and r and the state describe the same iterate
    assert eng.finished_steps == 3 and state.iteration == 3 and len(state.residuals) == 3
    expected = np.full(n, 1.0 / n)
    for _ in range(3):
        expected = eng.g @ expected
        expected /= expected.sum()
    assert np.array_equal(r, expected)
    # Python's handler is back once the driver has returned
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler


def test_the_driver_runs_outside_the_main_thread() -> None:
    """No signal handler can be installed there; the driver must not try."""
    eng = DenseEngine()
    r = np.full(6, 1.0 / 6)
    out: list[IterState] = []
    t = threading.Thread(
        target=lambda: out.append(iterate(eng, r, IterState(), RankOptions(tol=1e-12), Reporter()))
    )
    t.start()
    t.join()
    assert out and out[0].converged


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("d", [0.5, 0.85, 0.99])
def test_every_step_records_a_true_bound(method: str, seed: int, d: float) -> None:
    """The bound each step records holds for the vector that step returns (closed form: the
    eigenvector of the dense G for eigenvalue 1), for both step kinds, and the run stops only on
    a measured bound <= tol."""
    eng = DenseEngine(n=9, d=d, seed=seed, block=2 + seed % 3)
    r = np.full(9, 1.0 / 9)
    tol = 1e-10
    seen: list[np.ndarray] = []
    opts = RankOptions(method=method, tol=tol, damping=d, checkpoint_every=1, max_iter=5000)
    st = iterate(eng, r, IterState(), opts, Reporter(), lambda vec, _st: seen.append(vec.copy()))
    seen.append(r.copy())  # the converged step is not checkpointed
    exact = _exact(eng)
    assert st.converged and st.error_bound is not None and st.error_bound <= tol
    assert len(st.residuals) == len(st.bounds) == len(st.steps) == st.iteration == len(seen)
    assert set(st.steps) == {method}
    for k, (x, bound) in enumerate(zip(seen, st.bounds, strict=True), start=1):
        assert bound is not None
        # 1e-15: the closed form itself comes from a floating-point eigensolver
        assert np.abs(x - exact).sum() <= bound + 1e-15, f"step {k}"


def test_gauss_seidel_needs_fewer_steps_than_power() -> None:
    """Common practice (no source): on a PageRank system, Gauss-Seidel converges faster than
    the power (Jacobi) iteration; with the self-certifying bound it also stops sooner."""
    counts = {}
    for method in ("power", "gauss-seidel"):
        eng = DenseEngine(n=40, seed=11, block=5)
        r = np.full(40, 1.0 / 40)
        counts[method] = iterate(eng, r, IterState(), RankOptions(method=method, tol=1e-12),
                                 Reporter()).iteration
    assert counts["gauss-seidel"] < counts["power"]


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_max_iter_ends_on_a_measured_step(method: str) -> None:
    eng = DenseEngine(seed=4)
    r = np.full(6, 1.0 / 6)
    st = iterate(
        eng, r, IterState(), RankOptions(method=method, tol=1e-15, max_iter=4), Reporter()
    )
    assert st.iteration == 4 and not st.converged
    assert st.error_bound is not None and np.isfinite(st.error_bound)
    assert np.abs(r - _exact(eng)).sum() <= st.error_bound


@pytest.mark.parametrize(
    "bad",
    [
        np.array([0.5, np.nan, 0.5]),
        np.array([0.6, -0.1, 0.5]),
        np.array([0.5, 0.5, 1e-11]),
        np.array([np.inf, 0.0, 0.0]),
    ],
)
def test_invariants_refuse_broken_vectors(bad: np.ndarray) -> None:
    with pytest.raises(DamagedDataError):
        check_invariants(bad, 7)


def test_invariants_accept_a_distribution() -> None:
    assert check_invariants(np.array([0.25, 0.25, 0.5]), 1) == 1.0


@pytest.mark.parametrize(
    ("bad", "words"),
    [(float("nan"), "non-finite"), (float("inf"), "non-finite"), (-0.1, "negative")],
)
def test_invariants_reject_nan_inf_and_negative_scores(bad: float, words: str) -> None:
    from shardrank.errors import DamagedDataError
    from shardrank.solve.driver import check_invariants

    r = np.full(4, 0.25)
    r[2] = bad
    with pytest.raises(DamagedDataError, match=words):
        check_invariants(r, 7)
    with pytest.raises(DamagedDataError, match="not 1"):
        check_invariants(np.full(4, 0.3), 7)
    assert check_invariants(np.full(4, 0.25), 7) == 1.0
