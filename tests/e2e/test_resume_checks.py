"""`shardrank resume`: falls back past a damaged checkpoint, and refuses what it cannot continue.

Runs are stopped in process at a chosen iteration by a reporter that raises KeyboardInterrupt
(what Ctrl-C does), which leaves the checkpoints of the last two iterations.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import shardrank
from shardrank import RankOptions
from shardrank.cli.main import main
from shardrank.progress import Reporter
from tests.conftest import random_graph
from tests.reference.test_exact_solve import write_teleport


class StopAt(Reporter):
    """Press Ctrl-C once iteration ``k`` has been done."""

    def __init__(self, k: int) -> None:
        self.k = k

    def progress(
        self, phase: str, done: float, total: float | None, unit: str = "", **fields: Any
    ) -> None:
        if phase == "ranking" and done == self.k:
            raise KeyboardInterrupt


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A weighted, personalised run stopped after iteration 6, and the bytes of the same run
    uninterrupted."""
    from tests.conftest import write_edges

    tmp = tmp_path_factory.mktemp("resume")
    rng = np.random.default_rng(31)
    src, dst = random_graph(rng, 2000, 8000)
    f = write_edges(
        tmp / "edges.parquet", src.tolist(), dst.tolist(), rng.uniform(0.5, 2.0, src.size).tolist()
    )
    store = tmp / "store"
    shardrank.build_store([f], store, shardrank.BuildOptions(weight="w", block_nodes=500))
    tele = write_teleport(tmp / "t.parquet", src[:40].tolist(), [1.0] * 40)
    opts = dict(method="gauss-seidel", tol=1e-12, teleport=str(tele), checkpoint_every=1, threads=1)
    ref = shardrank.rank(store, tmp / "ref", RankOptions(**opts))  # type: ignore[arg-type]
    assert ref.iterations > 8
    run = tmp / "run"
    with pytest.raises(KeyboardInterrupt):
        shardrank.rank(store, run, RankOptions(**opts), StopAt(6))  # type: ignore[arg-type]
    ckpts = sorted(p.name for p in (run / "checkpoints").iterdir())
    assert ckpts == ["iter-000005", "iter-000006"]
    return {
        "store": store,
        "run": run,
        "tele": tele,
        "ref": (tmp / "ref" / "scores.npy").read_bytes(),
        "edges": f,
    }


@pytest.fixture
def stopped(template: dict[str, Any], tmp_path: Path) -> dict[str, Any]:
    """A fresh copy of the stopped run (the store and teleport table stay shared)."""
    run = tmp_path / "run"
    shutil.copytree(template["run"], run)
    return {**template, "run": run}


def _flip_byte(path: Path, offset: int = -9) -> None:
    data = bytearray(path.read_bytes())
    data[offset] ^= 0x40
    path.write_bytes(bytes(data))


def test_resume_continues_bitwise(
    stopped: dict[str, Any], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["resume", str(stopped["run"]), "--threads", "1"]) == 0
    assert "resuming at iteration 6" in capsys.readouterr().err
    assert (stopped["run"] / "scores.npy").read_bytes() == stopped["ref"]


def test_damaged_newest_checkpoint_falls_back_to_the_older(
    stopped: dict[str, Any], capsys: pytest.CaptureFixture[str]
) -> None:
    _flip_byte(stopped["run"] / "checkpoints" / "iter-000006" / "scores.npy")
    assert main(["resume", str(stopped["run"]), "--threads", "1"]) == 0
    err = capsys.readouterr().err
    assert "skipped damaged checkpoint iter-000006" in err and "resuming at iteration 5" in err
    assert (stopped["run"] / "scores.npy").read_bytes() == stopped["ref"]


def test_both_checkpoints_damaged_starts_over(
    stopped: dict[str, Any], capsys: pytest.CaptureFixture[str]
) -> None:
    _flip_byte(stopped["run"] / "checkpoints" / "iter-000006" / "scores.npy", offset=200)
    state = stopped["run"] / "checkpoints" / "iter-000005" / "state.json"
    state.write_text(state.read_text()[:40])  # torn JSON
    assert main(["resume", str(stopped["run"]), "--threads", "1"]) == 0
    err = capsys.readouterr().err
    # each skipped checkpoint is named with its reason (before the fix: only "starting over")
    assert "skipped damaged checkpoint iter-000006: scores.npy does not match its checksum" in err
    assert "skipped damaged checkpoint iter-000005" in err and "starting over" in err
    assert (stopped["run"] / "scores.npy").read_bytes() == stopped["ref"]


@pytest.mark.parametrize(
    "flag, value, name",
    [
        ("--damping", "0.9", "damping"),
        ("--tol", "1e-6", "tol"),
        ("--method", "power", "method"),
        ("--dead-ends", "uniform", "dead_ends"),
        ("--max-iter", "50", "max_iter"),
    ],
)
def test_resume_refuses_other_options(
    stopped: dict[str, Any], capsys: pytest.CaptureFixture[str], flag: str, value: str, name: str
) -> None:
    assert main(["resume", str(stopped["run"]), flag, value]) == 2
    err = capsys.readouterr().err
    assert "error:" in err and "options differ" in err and name in err and "hint:" in err
    assert (stopped["run"] / "checkpoints" / "iter-000006").is_dir()  # nothing was touched


def test_resume_accepts_the_runs_own_options(stopped: dict[str, Any]) -> None:
    args = ["--damping", "0.85", "--tol", "1e-12", "--method", "gauss-seidel", "--threads", "1"]
    assert main(["resume", str(stopped["run"]), *args]) == 0
    assert (stopped["run"] / "scores.npy").read_bytes() == stopped["ref"]


def test_resume_refuses_a_changed_store(
    stopped: dict[str, Any], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the same edges with one more row: another fingerprint
    from tests.conftest import write_edges

    other = tmp_path / "other"
    f = write_edges(tmp_path / "e.parquet", [1, 2, 3], [2, 3, 1], [1.0, 1.0, 1.0])
    shardrank.build_store(
        [stopped["edges"], f], other, shardrank.BuildOptions(weight="w", block_nodes=500)
    )
    assert main(["resume", str(stopped["run"]), "--store", str(other)]) == 2
    err = capsys.readouterr().err
    assert "store changed" in err and "hint:" in err


def test_resume_refuses_a_damaged_store(
    stopped: dict[str, Any], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    copy = tmp_path / "store"
    shutil.copytree(stopped["store"], copy)
    shard = sorted(p for p in copy.rglob("*.npy") if "offsets" not in p.name)[-1]
    _flip_byte(shard)
    assert main(["resume", str(stopped["run"]), "--store", str(copy)]) == 4
    assert "error:" in capsys.readouterr().err


def test_resume_refuses_a_changed_teleport_table(
    stopped: dict[str, Any], capsys: pytest.CaptureFixture[str]
) -> None:
    original = stopped["tele"].read_bytes()
    try:
        write_teleport(stopped["tele"], [1, 2], [1.0, 3.0])
        assert main(["resume", str(stopped["run"])]) == 2
    finally:
        stopped["tele"].write_bytes(original)
    assert "teleport table changed" in capsys.readouterr().err


def test_resume_refuses_a_finished_run(
    stopped: dict[str, Any], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["resume", str(stopped["run"]), "--threads", "1"]) == 0
    capsys.readouterr()
    assert main(["resume", str(stopped["run"])]) == 2
    assert "already finished" in capsys.readouterr().err
