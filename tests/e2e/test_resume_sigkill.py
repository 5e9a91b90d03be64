"""Kill `shardrank rank` (SIGKILL, SIGINT) at several points, `shardrank resume` it, and get the
bytes of an uninterrupted run.

The console script runs as a real subprocess with --checkpoint-every 1 on a 200k-node,
2M-edge store (four blocks), so an iteration takes tens of milliseconds; the test waits for a
given checkpoint to appear and kills the process right then (or a little later), i.e. in the
middle of an iteration, of a checkpoint write or of the pruning of old checkpoints.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions, RankOptions

CLI = str(Path(sys.executable).with_name("shardrank"))
TOL = "1e-12"


@pytest.fixture(scope="module")
def big_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    tmp = tmp_path_factory.mktemp("kill")
    rng = np.random.default_rng(9)
    n, m = 200_000, 2_000_000
    # a skewed source distribution makes the graph less regular (slower to converge) and gives it
    # dead ends
    src = (rng.pareto(1.5, m) * 1000).astype(np.int64) % n
    dst = rng.integers(0, n, m)
    pq.write_table(pa.table({"src": src, "dst": dst}), tmp / "edges.parquet")
    store = tmp / "store"
    shardrank.build_store([tmp / "edges.parquet"], store, BuildOptions(block_nodes=60_000))
    return store


@pytest.fixture(scope="module")
def reference(big_store: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    """Uninterrupted runs (in process: same code, same numba kernels) for each method."""
    tmp = tmp_path_factory.mktemp("ref")
    out = {}
    for method in ("gauss-seidel", "power"):
        res = shardrank.rank(
            big_store, tmp / method, RankOptions(method=method, tol=float(TOL), threads=1)
        )
        assert res.converged and res.iterations >= 12, (
            res.iterations
        )  # enough room for the kill points
        out[method] = (tmp / method / "scores.npy").read_bytes()
    return out


def _wait_for_checkpoint(p: subprocess.Popen[str], run: Path, iteration: int) -> None:
    """Until checkpoint ``iteration`` is complete (0: until run.json exists)."""
    marker = run / "checkpoints" / f"iter-{iteration:06d}" / "state.json"
    if iteration == 0:
        marker = run / "run.json"
    deadline = time.monotonic() + 120
    while not marker.exists():
        if p.poll() is not None:
            pytest.fail(
                f"the process ended (exit {p.returncode}) before checkpoint {iteration}: "
                f"{p.stderr.read()}"
            )
        if time.monotonic() > deadline:
            p.kill()
            pytest.fail(f"no checkpoint {iteration} after 120 s")
        time.sleep(0.002)


def _start(args: list[str]) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [CLI, *args, "--threads", "1", "-q"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _kill_at(p: subprocess.Popen[str], run: Path, iteration: int, delay: float, sig: int) -> None:
    _wait_for_checkpoint(p, run, iteration)
    time.sleep(delay)
    assert p.poll() is None, "the run finished before it could be killed"
    p.send_signal(sig)
    p.wait(timeout=60)


def _resume(run: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [CLI, "resume", str(run), "--threads", "1", "-q"], capture_output=True, text=True
    )


def test_killed_three_times_then_resumed_is_bitwise_equal(
    big_store: Path, reference: dict[str, bytes], tmp_path: Path
) -> None:
    run = tmp_path / "run"
    p = _start(["rank", str(big_store), "--out", str(run), "--checkpoint-every", "1", "--tol", TOL])
    _kill_at(
        p, run, 0, 0.0, signal.SIGKILL
    )  # as soon as the run exists (usually no checkpoint yet)
    assert p.returncode == -signal.SIGKILL
    # killed again while resuming, at two later points (one in the middle of an iteration)
    for iteration, delay in ((3, 0.0), (8, 0.013)):
        p = _start(["resume", str(run)])
        _kill_at(p, run, iteration, delay, signal.SIGKILL)
        assert p.returncode == -signal.SIGKILL
    done = _resume(run)
    assert done.returncode == 0, done.stderr
    assert (run / "scores.npy").read_bytes() == reference["gauss-seidel"]
    assert not (run / "checkpoints").exists()


def test_power_method_killed_and_resumed_is_bitwise_equal(
    big_store: Path, reference: dict[str, bytes], tmp_path: Path
) -> None:
    run = tmp_path / "run"
    p = _start(
        [
            "rank",
            str(big_store),
            "--out",
            str(run),
            "--method",
            "power",
            "--checkpoint-every",
            "1",
            "--tol",
            TOL,
        ]
    )
    _kill_at(p, run, 7, 0.02, signal.SIGKILL)
    done = _resume(run)
    assert done.returncode == 0, done.stderr
    assert (run / "scores.npy").read_bytes() == reference["power"]


def test_ctrl_c_then_resume_is_bitwise_equal(
    big_store: Path, reference: dict[str, bytes], tmp_path: Path
) -> None:
    """SIGINT (Ctrl-C) in the middle of an iteration: the run finishes that iteration, writes a
    consistent checkpoint (before the fix it saved a half-updated score vector, and the resumed
    run differed) and exits 130. tests/unit/test_solve_driver.py pins the exact moment."""
    delay = 0.027
    run = tmp_path / "run"
    p = _start(["rank", str(big_store), "--out", str(run), "--checkpoint-every", "3", "--tol", TOL])
    _kill_at(p, run, 3, delay, signal.SIGINT)
    assert p.returncode == 130, p.stderr.read()
    done = _resume(run)
    assert done.returncode == 0, done.stderr
    assert (run / "scores.npy").read_bytes() == reference["gauss-seidel"]
