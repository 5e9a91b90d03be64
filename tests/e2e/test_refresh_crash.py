"""`shardrank refresh` killed with SIGKILL in each phase, and two refreshes at once.

A refresh runs as a subprocess with the test hook ``SHARDRANK_TEST_PAUSE=<phase>``
(src/shardrank/refresh/hooks.py): it stops inside that phase, writes HOME/.test-paused and
sleeps, so the test kills it at a known point. While it is stopped, and after it is killed,
HOME/current must still resolve to a complete, valid run; the next refresh must finish the
job (resuming the rank from its checkpoint) and give exactly what an uninterrupted refresh
gives.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shardrank.cli.main import main
from shardrank.refresh.checks import validate_run

N, M = 5000, 50000
# checkpoints every 2 iterations, so that the rank hook fires early and resume has work left
OPTS = ["--checkpoint-every", "2", "-q"]


def snapshot(path: Path, churn: float = 0.0, seed: int = 11) -> Path:
    """An invented link graph (random sources, Pareto destinations); ``churn`` of its edges moved."""
    rng = np.random.default_rng(seed)
    src = rng.integers(0, N, M)
    dst = (rng.pareto(1.2, M) * 20).astype(np.int64) % N
    if churn:
        r2 = np.random.default_rng(seed + 1)
        idx = r2.choice(M, int(M * churn), replace=False)
        dst[idx] = r2.integers(0, N + N // 100, idx.size)
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.table({"src": src, "dst": dst}), path)
    return path


def refresh(edges: Path, home: Path, *extra: str) -> int:
    return main(["refresh", "--edges", str(edges), "--home", str(home), *OPTS, *extra])


def start_paused(edges: Path, home: Path, phase: str) -> subprocess.Popen[bytes]:
    env = {**os.environ, "SHARDRANK_TEST_PAUSE": phase}
    cli = "import sys; from shardrank.cli.main import main; sys.exit(main(sys.argv[1:]))"
    cmd = [sys.executable, "-c", cli, "refresh", "--edges", str(edges), "--home", str(home), *OPTS]
    p = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    marker = home / ".test-paused"
    deadline = time.monotonic() + 60
    while not marker.exists():
        if p.poll() is not None:
            out, err = p.communicate()
            pytest.fail(
                f"refresh ended (exit {p.returncode}) before pausing in {phase}: {err.decode()}"
            )
        if time.monotonic() > deadline:
            p.kill()
            pytest.fail(f"refresh did not reach the {phase} pause point")
        time.sleep(0.05)
    assert marker.read_text().split()[0] == phase
    return p


def kill(p: subprocess.Popen[bytes]) -> None:
    p.send_signal(signal.SIGKILL)
    p.wait(timeout=30)
    p.communicate()
    assert p.returncode == -signal.SIGKILL


def assert_current_is_valid(home: Path, expect: str) -> Path:
    run = (home / "current").resolve()
    assert run == (home / "runs" / expect).resolve()
    doc = json.loads((run / "run.json").read_text())
    slow, bad, _ = validate_run(run, doc["n_nodes"])
    assert not slow and not bad
    return run


@pytest.fixture(scope="module")
def nights(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Two snapshots and the result of an uninterrupted pair of refreshes (the reference)."""
    d = tmp_path_factory.mktemp("nights")
    n1, n2 = snapshot(d / "n1/e.parquet"), snapshot(d / "n2/e.parquet", churn=0.01)
    ref = d / "reference-home"
    assert refresh(n1, ref) == 0 and refresh(n2, ref) == 0
    return {"n1": n1, "n2": n2, "reference": (ref / "current").resolve()}


@pytest.mark.parametrize("phase", ["build", "rank", "publish"])
def test_sigkill_then_rerun_gives_the_uninterrupted_result(
    tmp_path: Path, nights: dict[str, Path], phase: str
) -> None:
    home = tmp_path / "home"
    assert refresh(nights["n1"], home) == 0
    p = start_paused(nights["n2"], home, phase)
    try:
        assert_current_is_valid(home, "gen-000001")  # readers are unaffected while it works
        if phase == "build":
            assert any(".partial-" in x.name for x in (home / "stores").iterdir())
        if phase == "rank":
            assert (
                json.loads((home / "runs/gen-000002/run.json").read_text())["status"] == "running"
            )
    finally:
        kill(p)
    assert_current_is_valid(home, "gen-000001")  # and after the kill
    assert refresh(nights["n2"], home) == 0
    run = assert_current_is_valid(home, "gen-000002")
    summary = json.loads((run / "refresh.json").read_text())
    if phase == "rank":  # resumed from its checkpoint, not started over
        assert summary["resumed"]["phase"] == "rank" and summary["resumed"]["from_iteration"] >= 2
        assert json.loads((run / "run.json").read_text())["resumed"] == 1
    elif phase == "publish":  # the finished run was published, not recomputed
        assert summary["resumed"] == {"phase": "publish"} and "rank" not in summary["seconds"]
    else:
        assert summary["resumed"] is None
    assert sorted(x.name for x in (home / "stores").iterdir()) == ["gen-000001", "gen-000002"]
    # bit for bit what the uninterrupted refresh published
    got = np.load(run / "scores.npy")
    want = np.load(nights["reference"] / "scores.npy")
    assert np.array_equal(got, want)
    assert pq.read_table(run / "scores.parquet").equals(
        pq.read_table(nights["reference"] / "scores.parquet")
    )


def test_second_concurrent_refresh_exits_75_and_a_dead_holder_frees_the_lock(
    tmp_path: Path, nights: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    home = tmp_path / "home"
    p = start_paused(nights["n1"], home, "rank")  # holds the lock while it sleeps
    try:
        assert refresh(nights["n1"], home) == 75
        err = capsys.readouterr().err
        assert "already running" in err and f"pid {p.pid}" in err and "hint:" in err
    finally:
        kill(p)
    # the kernel released the dead holder's lock: the next refresh runs. Its snapshot is a new
    # one, so the unfinished generation 1 is abandoned (not resumed) and generation 2 published.
    assert refresh(nights["n2"], home) == 0
    run = assert_current_is_valid(home, "gen-000002")
    assert json.loads((run / "refresh.json").read_text())["resumed"] is None
    assert json.loads((home / "runs/gen-000001/run.json").read_text())["status"] == "running"
