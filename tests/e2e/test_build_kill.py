"""A build killed with SIGKILL at any point leaves nothing `inspect` accepts; the rerun succeeds.

The build runs as a real process (the console entry point) with `--log-format json`; the test
reads its phase events and kills it right after a chosen phase starts, so every kill point is
reached on any machine speed. Expected behaviour is the issue's crash-safety contract: the build
writes into a `.STORE.partial-PID` sibling and renames it into place only when complete.
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

pytestmark = pytest.mark.slow

N_EDGES = 600_000  # about 1 s of build on one core: enough room for every kill point

# the build has two paths (a counting sort for unweighted integer keys, SQL otherwise) with
# their own phases; a probe run of each lists them, and the test kills a build at every one
PATHS = {"counting-sort": [], "sql": ["--weight", "w"]}


@pytest.fixture(scope="module")
def big_input(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, int]:
    d = tmp_path_factory.mktemp("kill-input")
    rng = np.random.default_rng(99)
    src = rng.integers(0, N_EDGES // 6, N_EDGES)
    dst = rng.integers(0, N_EDGES // 6, N_EDGES)
    f = d / "edges.parquet"
    w = rng.uniform(0.5, 2.0, N_EDGES)
    pq.write_table(pa.table({"src": src, "dst": dst, "w": w}), f, row_group_size=250_000)
    # the normalised edge count, worked out with numpy alone: distinct (src, dst) pairs
    pairs = np.sort(src * (N_EDGES // 6) + dst)
    n_edges = 1 + int(np.count_nonzero(np.diff(pairs)))
    return f, n_edges


def _start(edges: Path, out: Path, *extra: str) -> subprocess.Popen[str]:
    cmd = [
        sys.executable,
        "-c",
        "from shardrank.cli.main import entry; entry()",
        "build",
        str(edges),
        "--out",
        str(out),
        "--block-nodes",
        "4096",
        "--threads",
        "1",
        "--log-format",
        "json",
        *extra,
    ]
    return subprocess.Popen(
        cmd,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )


def _kill_at(p: subprocess.Popen[str], phase: str, delay: float) -> bool:
    """SIGKILL ``p`` once it reports ``phase``; False if it finished before that."""
    assert p.stderr is not None
    for line in p.stderr:
        try:
            ev = json.loads(line)
        except ValueError:
            continue
        if ev.get("phase") == phase:
            time.sleep(delay)
            p.send_signal(signal.SIGKILL)
            p.wait()  # reap it, so its pid is really gone
            return p.returncode == -signal.SIGKILL
    p.wait()
    return False


def _phases(edges: Path, out: Path, *extra: str) -> list[str]:
    """The phases a full build reports, in order (publishing excluded)."""
    p = _start(edges, out, *extra)
    assert p.stderr is not None
    names: list[str] = []
    for line in p.stderr:
        ph = json.loads(line).get("phase") if line.startswith("{") else None
        if ph and ph != "publish" and ph not in names:
            names.append(ph)
    assert p.wait() == 0
    return names


def _partials(out: Path) -> list[Path]:
    return sorted(out.parent.glob(f".{out.name}.partial-*"))


@pytest.mark.parametrize("path", list(PATHS))
def test_killed_builds_leave_no_store_and_the_rerun_cleans_up(
    path: str, big_input: tuple[Path, int], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    edges, n_edges = big_input
    phases = _phases(edges, tmp_path / "probe.store", *PATHS[path])
    assert len(phases) >= 4, phases
    out = tmp_path / "crawl.store"
    killed = 0
    for phase in phases:
        p = _start(edges, out, *PATHS[path])
        if not _kill_at(p, phase, 0.0):
            continue
        killed += 1
        assert not out.exists(), f"a store appeared after a kill at {phase!r}"
        assert main(["inspect", str(out)]) != 0
        assert main(["verify", str(out)]) != 0
        # this build's sibling is there; the ones of earlier killed builds were cleaned at its start
        assert [q.name for q in _partials(out)] == [f".{out.name}.partial-{p.pid}"], (
            "the kill came too late?"
        )
    assert killed >= len(phases) - 1
    capsys.readouterr()
    assert (
        main(["build", str(edges), "--out", str(out), "--block-nodes", "4096", "-q", *PATHS[path]])
        == 0
    )
    assert _partials(out) == []  # the interrupted builds' siblings are gone
    assert main(["verify", str(out), "-q"]) == 0
    assert main(["inspect", str(out), "--json"]) == 0
    facts = json.loads(capsys.readouterr().out)
    assert facts["edges"] == n_edges and facts["weighted"] == (path == "sql")


def test_kill_during_publish_leaves_nothing_or_a_sound_store(
    big_input: tuple[Path, int], tmp_path: Path
) -> None:
    edges, n_edges = big_input
    out = tmp_path / "crawl.store"
    p = _start(edges, out)
    _kill_at(p, "publish", 0.0)
    if out.exists():  # the rename had happened: the store must then be complete
        assert main(["verify", str(out), "-q"]) == 0
    else:
        assert main(["inspect", str(out)]) != 0


def test_killed_overwrite_keeps_the_old_store(
    big_input: tuple[Path, int], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    edges, n_edges = big_input
    small = tmp_path / "small.csv"
    small.write_text("src,dst\n1,2\n2,3\n3,1\n")
    out = tmp_path / "crawl.store"
    assert main(["build", str(small), "--out", str(out), "-q"]) == 0
    before = (out / "manifest.json").read_bytes()
    for phase in _phases(edges, tmp_path / "probe.store")[1:3]:
        p = _start(edges, out, "--overwrite")
        assert _kill_at(p, phase, 0.0)
        assert (out / "manifest.json").read_bytes() == before
        assert main(["verify", str(out), "-q"]) == 0
    assert (
        main(["build", str(edges), "--out", str(out), "--overwrite", "--block-nodes", "4096", "-q"])
        == 0
    )
    assert _partials(out) == [] and main(["verify", str(out), "-q"]) == 0
    capsys.readouterr()
    assert main(["inspect", str(out), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["edges"] == n_edges
    assert sorted(p.name for p in out.parent.iterdir()) == [
        "crawl.store",
        "probe.store",
        "small.csv",
    ]
