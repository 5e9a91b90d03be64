"""The Dask engine: the local engine's iteration with each shard's gather run as a Dask task.

Same store, same kernels, same driver; only where the gathers run changes. The unit of work is
one shard (one destination block). Per step the driver (this process) scales the scores
exactly as :class:`~shardrank.solve.engine.LocalEngine` does, writes what the tasks read into
an exchange directory on shared storage, and combines what they return::

    EXCHANGE/<session>/step-000012/s.npy            float64[N]   scaled scores r / w_out by slot
    EXCHANGE/<session>/step-000012/r-000003.npy     float64[n_b] block 3's scores before the step
    EXCHANGE/<session>/step-000012/fresh-000003.npy float64[n_b] block 3's fresh scaled scores
                                                                 in id order (Gauss-Seidel only)

EXCHANGE is --exchange (a shared directory or URL); without it, a directory in /dev/shm
(memory) when every worker runs on the driver's machine, else RUN/exchange.

Every file is written once, before any task that reads it is submitted, and never changed; a
task returns its block's scores and per-chunk residual partials and writes nothing. So a retry,
or a task run again because its worker died, returns the same bytes. The driver writes the
blocks into ``r`` and adds the partials with ``math.fsum`` in block order, as the local engine
does: the results are bitwise equal to the local engine's.

Power steps run all blocks in parallel. A Gauss-Seidel sweep is a chain: block b needs the
fresh scores of blocks < b, so the driver submits block b after block b-1 returned (one task
at a time; each worker keeps the sweep's vector and adds fresh blocks to it as they come).
``r`` is only changed once a whole step has returned, so an interrupt leaves the previous
iterate intact for the checkpoint.
"""

from __future__ import annotations

import hashlib
import io
import logging
import math
import os
import secrets
import shutil
import socket
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
from distributed import Client, Future, LocalCluster, as_completed
from distributed.client import FutureCancelledError
from distributed.comm.core import CommClosedError
from distributed.scheduler import KilledWorker

from .. import settings
from ..errors import BadInputError, EngineLostError
from ..kernels import n_chunks, scale_range
from ..store import urls
from ..store.reader import StoreReader
from .dask_tasks import BlockTask, StepJob, power_block, probe, step_file, sweep_block
from .options import RankOptions
from .problem import Problem

BlockHook = Callable[[int, int], None]
EXCHANGE_DIR = "exchange"  # inside the run directory when --exchange is not given
SHM_DIR = "/dev/shm"  # memory-backed files: the exchange when every worker is on this machine
CONNECT_SECONDS = 30.0  # wait for a scheduler to answer
WORKERS_SECONDS = 120.0  # wait for the first worker to join a scheduler
TASK_RETRIES = 2  # re-runs of a task that raised (e.g. a transient storage error)


def _write_vector(loc: urls.Location, a: np.ndarray) -> None:
    """Publish a float64 vector as .npy: a local file appears whole (rename), an object at once.

    No fsync: exchange files live for one step; a crash loses the step, not a result.
    """
    if loc.local is not None:
        loc.local.parent.mkdir(parents=True, exist_ok=True)
        tmp = loc.local.with_name(loc.local.name + ".partial")
        with open(tmp, "wb") as f:
            np.lib.format.write_array(f, np.ascontiguousarray(a), allow_pickle=False)
        os.replace(tmp, loc.local)
        return
    buf = io.BytesIO()
    np.lib.format.write_array(buf, np.ascontiguousarray(a), allow_pickle=False)
    fs, path = urls.filesystem(loc)
    fs.makedirs(path.rsplit("/", 1)[0], exist_ok=True)
    fs.pipe_file(path, buf.getvalue())


def _connect(options: RankOptions) -> tuple[Client, LocalCluster | None]:
    if options.scheduler:
        try:
            client = Client(options.scheduler, timeout=CONNECT_SECONDS, set_as_default=False)
        except (OSError, TimeoutError) as e:
            raise BadInputError(
                f"--scheduler {options.scheduler}: no Dask scheduler answers ({e})",
                hint="start one with `dask scheduler` (and `dask worker ADDRESS` on each "
                "machine), or omit --scheduler to use local worker processes; a run can "
                "move: `shardrank resume RUN --scheduler ADDRESS`",
            ) from None
        try:
            client.wait_for_workers(1, timeout=WORKERS_SECONDS)
        except TimeoutError:
            client.close()
            raise BadInputError(
                f"--scheduler {options.scheduler}: no worker joined within {WORKERS_SECONDS:.0f} s",
                hint=f"start workers with `dask worker {options.scheduler} --nthreads 1`",
            ) from None
        return client, None
    n = options.workers or os.cpu_count() or 1
    # one thread per worker process: numba's default (workqueue) threading layer must not be
    # entered by two threads of a process at once; a task that needs more cores uses numba's
    # own threads (see dask_tasks._default_threads)
    cluster = LocalCluster(
        n_workers=n,
        threads_per_worker=1,
        processes=True,
        dashboard_address="127.0.0.1:0",
        silence_logs=logging.ERROR,
    )
    return Client(cluster, set_as_default=False), cluster


def run_tag(run_dir: Path) -> str:
    """A name for one run's exchange directory outside the run directory."""
    return "run-" + hashlib.sha256(str(Path(run_dir).resolve()).encode()).hexdigest()[:12]


def _exchange(options: RankOptions, run_dir: Path, client: Client, n_nodes: int) -> urls.Location:
    """Where the step vectors go: --exchange; else memory (tmpfs) when every worker runs on
    this machine; else RUN/exchange, which every worker must see (shared storage)."""
    if options.exchange:
        # one subdirectory per run, so runs sharing an --exchange never clean up each other
        return urls.parse_location(options.exchange).child(run_tag(run_dir))
    shm = Path(SHM_DIR)
    if shm.is_dir() and os.access(shm, os.W_OK):
        # measured: step files on disk sometimes wait for writeback (0.3 s a step at scale
        # 22); in tmpfs they never do. 4 vectors of N float64 leave room for a sweep's files
        hosts = set(client.run(socket.gethostname).values())
        if hosts == {socket.gethostname()} and shutil.disk_usage(shm).free > 4 * 8 * n_nodes:
            return urls.parse_location(shm / f"shardrank-exchange-{run_tag(run_dir)}")
    return urls.parse_location(Path(run_dir) / EXCHANGE_DIR)


class DaskEngine:
    """Runs each shard's gather as a Dask task; see the module docstring.

    Memory on the driver: ``r`` (the caller's), ``s`` and the next iterate, float64[N] each;
    out-weights memory-mapped. On a worker: see docs/scale-out.md.
    """

    name = "dask"

    def __init__(
        self,
        reader: StoreReader,
        problem: Problem,
        client: Client,
        exchange: urls.Location,
        threads: int = 0,
        cluster: LocalCluster | None = None,
    ) -> None:
        self.reader, self.problem, self.client, self.cluster = reader, problem, client, cluster
        self.threads = threads  # numba threads inside each task (0: see StepJob.threads)
        self.chunk = settings.ROW_CHUNK
        self.blocks = reader.manifest.blocks
        self.w_out = np.asarray(reader.out_weight())
        slot = reader.read_slot()
        self.slot = np.empty(0, dtype=np.uint32) if slot is None else np.asarray(slot)
        self.s = np.empty(reader.n_nodes, dtype=np.float64)  # scaled scores, by read slot
        self.r_next = np.empty(reader.n_nodes, dtype=np.float64)
        self._dead_parts = [np.zeros(n_chunks(b.n_nodes, self.chunk)) for b in self.blocks]
        self.session = f"{socket.gethostname()}-{os.getpid()}-{secrets.token_hex(4)}"
        self.exchange = exchange
        # stale sessions of this run are left by a driver that was killed: nothing reads them
        urls.remove_tree(exchange)
        self.root = exchange.child(self.session)
        self.store = urls.location_of(reader).url
        self.step = 0
        try:
            with self._cluster_errors():
                self._check_workers()
        except BaseException:
            urls.remove_tree(self.exchange)
            raise
        self._teleport = [self._teleport_slice(b.first_node, b.n_nodes) for b in self.blocks]

    @classmethod
    def from_options(
        cls, reader: StoreReader, problem: Problem, options: RankOptions, run_dir: Path
    ) -> DaskEngine:
        client, cluster = _connect(options)
        try:
            exchange = _exchange(options, run_dir, client, reader.n_nodes)
            return cls(reader, problem, client, exchange, options.threads or 0, cluster)
        except BaseException:
            client.close()
            if cluster is not None:
                cluster.close()
            raise

    def _check_workers(self) -> None:
        """Every worker must open the same store and read the exchange: a run directory on a
        disk only the driver sees is the usual mistake, and is cheaper to report now."""
        mark = self.root.child("probe")
        token = self.session.encode()
        if mark.local is not None:
            mark.local.parent.mkdir(parents=True, exist_ok=True)
            mark.local.write_bytes(token)
        else:
            fs, path = urls.filesystem(mark)
            fs.makedirs(path.rsplit("/", 1)[0], exist_ok=True)
            fs.pipe_file(path, token)
        found = self.client.run(probe, self.store, self.reader.fingerprint, mark.url, token)
        urls.remove_tree(mark)
        bad = {w: err for w, err in sorted(found.items()) if err}
        if bad:
            where = "; ".join(f"{w}: {err}" for w, err in list(bad.items())[:3])
            raise BadInputError(
                f"{len(bad)} of {len(found)} Dask workers cannot read the store or the exchange "
                f"({where})",
                hint="put the store and the run directory (or --exchange) on storage every worker "
                "mounts at the same path, or use URLs (s3://...) that every worker can open",
            )

    # -- the driver's share: scaling, and what the tasks read -------------------------------
    def _teleport_slice(self, first: int, n: int) -> tuple[np.ndarray, np.ndarray] | None:
        t = self.problem.teleport
        if t.uniform:
            return None
        assert t.ids is not None and t.values is not None
        a, b = np.searchsorted(t.ids, [first, first + n])
        return (t.ids[a:b] - first).astype(np.int64), np.array(t.values[a:b], dtype=np.float64)

    def _scale_block(self, r: np.ndarray, i: int) -> float:
        b = self.blocks[i]
        part = self._dead_parts[i]
        scale_range(r, self.w_out, self.slot, b.first_node, b.first_node + b.n_nodes, self.chunk,
                    self.s, part)
        return math.fsum(part)

    def _begin_step(self, r: np.ndarray) -> tuple[urls.Location, StepJob]:
        self.step += 1
        step_dir = self.root.child(f"step-{self.step:06d}")
        _write_vector(step_file(step_dir, "s"), self.s)
        for b in self.blocks:
            _write_vector(
                step_file(step_dir, "r", b.index), r[b.first_node : b.first_node + b.n_nodes]
            )
        job = StepJob(
            store=self.store,
            fingerprint=self.reader.fingerprint,
            step_dir=step_dir.url,
            n_nodes=self.reader.n_nodes,
            damping=self.problem.damping,
            chunk=self.chunk,
            threads=self.threads,
            firsts=tuple(b.first_node for b in self.blocks),
        )
        return step_dir, job

    def _task(self, i: int, dead_mass: float) -> BlockTask:
        b = self.blocks[i]
        add_u, add_t = self.problem.constants(dead_mass)
        tele = self._teleport[i]
        return BlockTask(
            i,
            b.first_node,
            b.n_nodes,
            add_u,
            add_t,
            None if tele is None else tele[0],
            None if tele is None else tele[1],
        )

    def _submit(
        self, fn: Callable[..., Any], job: StepJob, task: BlockTask, workers: list[str]
    ) -> Future:
        # a preferred worker per block keeps each shard in one worker's page cache; the
        # preference is loose, so an idle or surviving worker takes the task when needed
        prefer = [workers[task.index % len(workers)]] if workers else None
        return self.client.submit(
            fn,
            job,
            task,
            key=f"{fn.__name__}-{self.session}-{self.step:06d}-{task.index:06d}",
            workers=prefer,
            allow_other_workers=True,
            retries=TASK_RETRIES,
            pure=False,
        )

    def _workers(self) -> list[str]:
        return sorted(self.client.nthreads())

    def _result(self, fut: Future) -> tuple[np.ndarray, np.ndarray]:
        y, part = fut.result()
        return y, part

    @contextmanager
    def _cluster_errors(self) -> Iterator[None]:
        """Turn a lost cluster into an error that says what to do (the driver has checkpoints)."""
        try:
            yield
        except KilledWorker as e:
            raise EngineLostError(
                f"dask: a task killed its worker repeatedly ({e})",
                hint="give workers more memory (see docs/scale-out.md), then "
                "`shardrank resume RUN` continues from the last checkpoint",
            ) from None
        except (FutureCancelledError, CommClosedError) as e:
            raise EngineLostError(
                f"dask: lost the cluster in step {self.step} ({type(e).__name__}: {e})",
                hint="restart the scheduler and workers, then `shardrank resume RUN "
                "--scheduler ADDRESS` continues from the last checkpoint",
            ) from None

    # -- the two sweeps ----------------------------------------------------------------------
    def power_step(self, r: np.ndarray, on_block: BlockHook | None = None) -> float:
        with self._cluster_errors():
            return self._power_step(r, on_block)

    def gauss_seidel_sweep(self, r: np.ndarray, on_block: BlockHook | None = None) -> float:
        with self._cluster_errors():
            return self._gauss_seidel_sweep(r, on_block)

    def _power_step(self, r: np.ndarray, on_block: BlockHook | None) -> float:
        dead = [self._scale_block(r, i) for i in range(len(self.blocks))]
        dead_mass = math.fsum(dead)
        step_dir, job = self._begin_step(r)
        workers = self._workers()
        futures = [
            self._submit(power_block, job, self._task(i, dead_mass), workers)
            for i in range(len(self.blocks))
        ]
        index = {f.key: i for i, f in enumerate(futures)}
        res = [0.0] * len(self.blocks)
        for done, fut in enumerate(as_completed(futures, loop=self.client.loop)):
            i = index[fut.key]
            y, part = self._result(fut)
            b = self.blocks[i]
            self.r_next[b.first_node : b.first_node + b.n_nodes] = y
            res[i] = math.fsum(part)
            fut.release()
            if on_block:
                on_block(done, len(self.blocks))
        r[:] = self.r_next
        urls.remove_tree(step_dir)
        return math.fsum(res)

    def _gauss_seidel_sweep(self, r: np.ndarray, on_block: BlockHook | None) -> float:
        dead = [self._scale_block(r, i) for i in range(len(self.blocks))]
        step_dir, job = self._begin_step(r)
        workers = self._workers()
        self.r_next[:] = r
        res = []
        for i, b in enumerate(self.blocks):
            fut = self._submit(sweep_block, job, self._task(i, math.fsum(dead)), workers)
            y, part = self._result(fut)
            fut.release()
            self.r_next[b.first_node : b.first_node + b.n_nodes] = y
            res.append(math.fsum(part))
            dead[i] = self._scale_block(
                self.r_next, i
            )  # block i's fresh scores feed the blocks after it
            if i + 1 < len(self.blocks):
                # the block's fresh scaled scores in id order; a task puts them at their slots
                ids = slice(b.first_node, b.first_node + b.n_nodes)
                fresh = self.s[self.slot[ids]] if self.slot.size else self.s[ids]
                _write_vector(step_file(step_dir, "fresh", i), fresh)
            if on_block:
                on_block(i, len(self.blocks))
        r[:] = self.r_next
        urls.remove_tree(step_dir)
        return math.fsum(res)

    def close(self) -> None:
        try:
            urls.remove_tree(self.exchange)  # this run's exchange only (see from_options)
        finally:
            self.client.close()
            if self.cluster is not None:
                self.cluster.close()
