"""The Dask engine on a real LocalCluster (2 worker processes, 1 thread each).

Checks: bitwise equality with the local engine (power and Gauss-Seidel, weighted with a
teleport table too), a store and an exchange at fsspec URLs, a worker SIGKILLed in the middle
of an iteration, and `shardrank resume` after the driver was SIGKILLed. One cluster serves the
module; a watchdog ends the run with every stack if a test hangs.
"""

from __future__ import annotations

import faulthandler
import json
import logging
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions, RankOptions, Reporter
from shardrank.cli.main import main
from shardrank.errors import BadInputError

distributed = pytest.importorskip("distributed")

CLI = str(Path(sys.executable).with_name("shardrank"))
TEST_SECONDS = 150  # longer means stuck: dump every thread's stack and end the test process


@pytest.fixture(autouse=True)
def watchdog() -> Iterator[None]:
    faulthandler.dump_traceback_later(TEST_SECONDS, exit=True)
    yield
    faulthandler.cancel_dump_traceback_later()


@pytest.fixture(scope="module")
def cluster() -> Iterator[Any]:
    faulthandler.dump_traceback_later(TEST_SECONDS, exit=True)
    c = distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        dashboard_address="127.0.0.1:0",
        silence_logs=logging.CRITICAL,
    )
    faulthandler.cancel_dump_traceback_later()
    try:
        yield c
    finally:
        c.close(timeout=30)


@pytest.fixture(scope="module")
def client(cluster: Any) -> Iterator[Any]:
    with distributed.Client(cluster, set_as_default=False) as cl:
        cl.wait_for_workers(2, timeout=60)
        yield cl


def _edges(path: Path, weighted: bool = False, n: int = 3000, m: int = 24_000) -> Path:
    """An invented random digraph: skewed sources (so some nodes are dead ends), duplicates."""
    rng = np.random.default_rng(5)
    src = (rng.pareto(1.2, m) * 50).astype(np.int64) % n
    cols: dict[str, Any] = {"src": src, "dst": rng.integers(0, n, m)}
    if weighted:
        cols["w"] = rng.uniform(0.5, 3.0, m)
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.table(cols), path)
    return path


@pytest.fixture(scope="module")
def stores(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Unweighted and weighted stores of 12 blocks (a power step is 12 tasks)."""
    tmp = tmp_path_factory.mktemp("dask-stores")
    out = {}
    for kind in ("plain", "weighted"):
        f = _edges(tmp / kind / "edges.parquet", weighted=kind == "weighted")
        out[kind] = tmp / kind / "store"
        shardrank.build_store(
            [f],
            out[kind],
            BuildOptions(block_nodes=256, weight="w" if kind == "weighted" else None),
        )
    tele = tmp / "teleport.parquet"
    pq.write_table(
        pa.table({"key": np.arange(0, 3000, 7), "weight": np.linspace(1.0, 5.0, 429)}), tele
    )
    out["teleport"] = tele
    return out


def _exchanges(run: Path) -> list[Path]:
    """Where a run's exchange may be: in memory (all workers here, the case in these tests)
    or in the run directory."""
    from shardrank.solve.dask_engine import EXCHANGE_DIR, SHM_DIR, run_tag

    return [Path(SHM_DIR) / f"shardrank-exchange-{run_tag(run)}", run / EXCHANGE_DIR]


def _scores(run: Path) -> np.ndarray:
    return np.load(run / "scores.npy")


def _local(store: Path | str, run: Path, **kw: Any) -> np.ndarray:
    shardrank.rank(store, run, RankOptions(**kw))
    return _scores(run)


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
@pytest.mark.parametrize("kind", ["plain", "weighted"])
def test_equals_local_engine_bit_for_bit(
    tmp_path: Path, client: Any, stores: dict[str, Path], method: str, kind: str
) -> None:
    # 10 steps (the last a power step) check the same as a converged run, in less time
    kw: dict[str, Any] = {"method": method, "tol": 1e-12, "max_iter": 10}
    if kind == "weighted":
        kw.update(teleport=str(stores["teleport"]), dead_ends="uniform")
    ref = _local(stores[kind], tmp_path / "local", **kw)
    res = shardrank.rank(
        stores[kind],
        tmp_path / "dask",
        RankOptions(engine="dask", scheduler=client.scheduler.address, **kw),
    )
    assert res.iterations == 10
    got = _scores(tmp_path / "dask")
    # same kernels, same inputs, partial sums added in the same order: the same bytes
    assert np.array_equal(got, ref), np.abs(got - ref).max()
    a, b = (
        json.loads((tmp_path / r / "run.json").read_text())["history"] for r in ("local", "dask")
    )
    assert a == b  # every step's residual too
    assert not any(p.exists() for p in _exchanges(tmp_path / "dask"))  # the engine cleans up


def test_agrees_with_networkx(tmp_path: Path, client: Any, stores: dict[str, Path]) -> None:
    """networkx.pagerank on the same (deduplicated) edges; dangling=None sends a dead end's
    score along the teleport vector, our default --dead-ends teleport."""
    nx = pytest.importorskip("networkx")
    t = pq.read_table(stores["plain"].parent / "edges.parquet")
    g = nx.DiGraph()  # the nodes are those of the edges, as in the store
    g.add_edges_from(zip(t.column("src").to_pylist(), t.column("dst").to_pylist(), strict=True))
    # damping 0.5 converges in a few dozen steps (the test stays short)
    want = nx.pagerank(g, alpha=0.5, tol=1e-14, max_iter=1000)
    res = shardrank.rank(
        stores["plain"],
        tmp_path / "r",
        RankOptions(
            engine="dask",
            method="power",
            damping=0.5,
            tol=1e-11,
            scheduler=client.scheduler.address,
        ),
    )
    assert res.converged
    out = pq.read_table(tmp_path / "r" / "scores.parquet")
    got = dict(zip(out.column("key").to_pylist(), out.column("score").to_pylist(), strict=True))
    assert sum(abs(got[k] - want[k]) for k in want) < 1e-9


def test_store_and_exchange_at_fsspec_urls(
    tmp_path: Path, client: Any, monkeypatch: pytest.MonkeyPatch
) -> None:
    """`build --out URL` uploads; `rank URL` reads through a verified mirror (driver) and each
    worker's own mirror. simplecache:: over a local directory is a real fsspec filesystem that
    cannot be memory-mapped in place, standing in for object storage (s3fs is not installed)."""
    monkeypatch.setenv("SHARDRANK_CACHE_DIR", str(tmp_path / "driver-cache"))
    edges = _edges(tmp_path / "edges.parquet")
    url = f"simplecache::file://{tmp_path}/shared/crawl.store"
    assert main(["build", str(edges), "--out", url, "--block-nodes", "256", "-q"]) == 0
    assert (tmp_path / "shared" / "crawl.store" / "manifest.json").is_file()
    assert main(["build", str(edges), "--out", url, "-q"]) == 2  # exists: needs --overwrite
    shardrank.build_store([edges], tmp_path / "local.store", BuildOptions(block_nodes=256))
    ref = _local(tmp_path / "local.store", tmp_path / "ref", max_iter=8)
    xch = f"simplecache::file://{tmp_path}/shared/exchange"
    assert (
        main(
            [
                "rank",
                url,
                "--out",
                str(tmp_path / "run"),
                "--engine",
                "dask",
                "--scheduler",
                client.scheduler.address,
                "--exchange",
                xch,
                "--max-iter",
                "8",
                "-q",
            ]
        )
        == 3
    )  # 3: not converged
    assert np.array_equal(_scores(tmp_path / "run"), ref)
    assert json.loads((tmp_path / "run" / "run.json").read_text())["store"]["path"] == url
    assert os.listdir(tmp_path / "shared" / "exchange") == []  # the run's exchange is gone
    # the driver mirrored the node-sized files only: the shards were read by the workers
    mirror = next((tmp_path / "driver-cache").iterdir())
    assert (mirror / "out_weight.npy").is_file() and not (mirror / "shards").exists()


class _KillAWorker(Reporter):
    """Kills one worker process when block 1 of iteration ``at`` has returned (others in flight)."""

    def __init__(self, client: Any, at: int) -> None:
        self.client, self.at = client, at
        self.killed: list[int] = []

    def progress(
        self, phase: str, done: float, total: float | None, unit: str = "", **fields: Any
    ) -> None:
        if phase == f"iteration {self.at}" and done == 1 and not self.killed:
            pids = self.client.run(os.getpid)
            victim = pids[sorted(pids)[0]]
            os.kill(victim, signal.SIGKILL)
            self.killed.append(victim)


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_worker_killed_mid_iteration(
    tmp_path: Path, client: Any, stores: dict[str, Path], method: str
) -> None:
    ref = _local(stores["plain"], tmp_path / "local", method=method, max_iter=8)
    rep = _KillAWorker(client, at=3)
    res = shardrank.rank(
        stores["plain"],
        tmp_path / "dask",
        RankOptions(engine="dask", method=method, max_iter=8, scheduler=client.scheduler.address),
        reporter=rep,
    )
    assert rep.killed and res.iterations == 8
    assert np.array_equal(_scores(tmp_path / "dask"), ref)
    client.wait_for_workers(2, timeout=60)  # the nanny restarted it
    assert rep.killed[0] not in client.run(os.getpid).values()


def test_resume_after_driver_sigkill(tmp_path: Path, client: Any, stores: dict[str, Path]) -> None:
    opts = ["--method", "power", "--max-iter", "30"]  # stops at 30, not converged (exit 3)
    ref = _local(stores["plain"], tmp_path / "local", method="power", max_iter=30)
    run = tmp_path / "run"
    p = subprocess.Popen(
        [
            CLI,
            "rank",
            str(stores["plain"]),
            "--out",
            str(run),
            "--engine",
            "dask",
            "--scheduler",
            client.scheduler.address,
            "--checkpoint-every",
            "2",
            "-q",
            *opts,
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    marker = run / "checkpoints" / "iter-000004" / "state.json"
    deadline = time.monotonic() + 90
    try:
        while not marker.exists():
            err = p.stderr.read() if p.stderr and p.poll() is not None else ""
            assert p.poll() is None, f"the driver ended (exit {p.returncode}) first: {err}"
            assert time.monotonic() < deadline, "no checkpoint 4 within 90 s"
            time.sleep(0.005)
        p.send_signal(signal.SIGKILL)
    finally:
        p.kill()
        p.wait(timeout=30)
    assert json.loads((run / "run.json").read_text())["status"] == "running"
    # the killed driver's files: the resumed engine clears them
    assert any(p.exists() for p in _exchanges(run))
    assert main(["resume", str(run), "-q"]) == 3
    doc = json.loads((run / "run.json").read_text())
    assert doc["resumed"] == 1 and doc["iterations"] == 30 and doc["options"]["engine"] == "dask"
    assert np.array_equal(_scores(run), ref)
    assert not any(p.exists() for p in _exchanges(run))


def test_own_local_cluster_from_the_cli(tmp_path: Path, stores: dict[str, Path]) -> None:
    """--workers N without --scheduler starts (and closes) N local worker processes."""
    ref = _local(stores["plain"], tmp_path / "local", method="power", max_iter=5)
    assert (
        main(
            [
                "rank",
                str(stores["plain"]),
                "--out",
                str(tmp_path / "run"),
                "--engine",
                "dask",
                "--workers",
                "2",
                "--method",
                "power",
                "--max-iter",
                "5",
                "-q",
            ]
        )
        == 3
    )
    assert np.array_equal(_scores(tmp_path / "run"), ref)


def test_unreachable_scheduler_is_exit_2(
    tmp_path: Path,
    stores: dict[str, Path],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    from shardrank.solve import dask_engine

    monkeypatch.setattr(dask_engine, "CONNECT_SECONDS", 1.0)
    assert (
        main(
            [
                "rank",
                str(stores["plain"]),
                "--out",
                str(tmp_path / "run"),
                "--engine",
                "dask",
                "--scheduler",
                "tcp://127.0.0.1:9",
                "-q",
            ]
        )
        == 2
    )
    err = capsys.readouterr().err
    assert "no Dask scheduler answers" in err and "hint:" in err
    assert not (tmp_path / "run").exists()


def test_exchange_the_workers_cannot_read_is_exit_2(
    tmp_path: Path, client: Any, stores: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    """memory:// lives in one process: the driver's writes are invisible to the workers, like
    a run directory on a disk that only the driver's machine mounts."""
    args = ["rank", str(stores["plain"]), "--out", str(tmp_path / "run"), "--engine", "dask"]
    args += ["--scheduler", client.scheduler.address, "--exchange", "memory://exchange", "-q"]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "2 of 2 Dask workers cannot read" in err and "hint:" in err
    assert not (tmp_path / "run").exists()  # exit 2: nothing written


def test_dask_options_need_the_dask_engine(
    tmp_path: Path, stores: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    assert (
        main(["rank", str(stores["plain"]), "--out", str(tmp_path / "run"), "--workers", "2", "-q"])
        == 2
    )
    assert "--engine dask" in capsys.readouterr().err
    assert not (tmp_path / "run").exists()


def test_missing_dask_says_what_to_install(
    tmp_path: Path, stores: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    from shardrank.solve.engine import ENGINES
    from shardrank.solve.problem import Problem, Teleport

    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now fails
    monkeypatch.delitem(sys.modules, "shardrank.solve.dask_engine", raising=False)
    reader = shardrank.open_store(stores["plain"])
    with pytest.raises(BadInputError) as e:
        ENGINES["dask"](
            reader,
            Problem(0.85, Teleport(reader.n_nodes), "teleport"),
            RankOptions(engine="dask"),
            tmp_path,
        )
    assert "shardrank[dask]" in (e.value.hint or "")
