"""Engines run the two kinds of sweep over a store; the driver decides which and when.

An engine owns where the work happens. :class:`LocalEngine` streams memory-mapped shards
through the numba kernels in this process. A second engine (distributed) implements the same
two methods; the driver, the convergence test and the checkpoints are shared.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from pathlib import Path
from typing import Protocol

import numba
import numpy as np

from .. import settings
from ..errors import BadInputError
from ..kernels import gather_block, n_chunks, scale_range
from ..store import layout
from ..store.reader import Shard, StoreReader
from .options import RankOptions
from .problem import Problem

BlockHook = Callable[[int, int], None]


class Engine(Protocol):
    name: str

    def power_step(self, r: np.ndarray, on_block: BlockHook | None = None) -> float:
        """Replace ``r`` by G r (unnormalised); return ||G r - r||_1."""
        ...

    def gauss_seidel_sweep(self, r: np.ndarray, on_block: BlockHook | None = None) -> float:
        """One block Gauss-Seidel sweep in place; return the L1 change."""
        ...

    def close(self) -> None: ...


class LocalEngine:
    """Streams the shards of one store through the kernels, block by block, in block order.

    Memory: ``r`` (the caller's) and ``s`` are float64[N]; out-weights and read slots are
    memory-mapped; one block-sized teleport buffer when the teleport is not uniform.
    """

    name = "local"

    def __init__(self, reader: StoreReader, problem: Problem, threads: int | None = None) -> None:
        self.reader = reader
        self.problem = problem
        # None means all of numba's threads: an earlier run in this process may have set fewer
        cores = numba.config.NUMBA_NUM_THREADS
        numba.set_num_threads(min(threads, cores) if threads else cores)
        self.threads = numba.get_num_threads()
        self.w_out = np.asarray(reader.out_weight())
        slot = reader.read_slot()
        self.slot = np.empty(0, dtype=np.uint32) if slot is None else np.asarray(slot)
        self.s = np.empty(reader.n_nodes, dtype=np.float64)  # scaled scores, by read slot
        self.chunk = settings.ROW_CHUNK
        self.blocks = reader.manifest.blocks
        self._v_buf = np.empty(0 if problem.teleport.uniform else max(b.n_nodes for b in self.blocks))
        self._no_v = np.empty(0, dtype=np.float64)
        self._no_w = np.empty(0, dtype=np.float64)
        self._dead_parts = [np.zeros(n_chunks(b.n_nodes, self.chunk)) for b in self.blocks]
        self._res_parts = [np.zeros(n_chunks(b.n_nodes, self.chunk)) for b in self.blocks]
        # Keep shard mappings open across iterations when that costs few file descriptors
        # (each mapping holds one): reopening them every sweep dominated small-block runs.
        files = 3 if reader.weighted else 2
        shard_bytes = sum(f.bytes for name, f in reader.manifest.files.items()
                          if name.startswith(layout.SHARD_DIR + "/"))
        self._keep_shards = (len(self.blocks) * files <= settings.MAX_OPEN_SHARD_FILES
                             and shard_bytes <= settings.MAX_KEPT_SHARD_BYTES)
        self._shards: dict[int, Shard] = {}

    def _shard(self, i: int) -> Shard:
        if not self._keep_shards:
            return self.reader.shard(i)
        sh = self._shards.get(i)
        if sh is None:
            sh = self._shards[i] = self.reader.shard(i)
        return sh

    def _scale_block(self, r: np.ndarray, i: int) -> float:
        b = self.blocks[i]
        part = self._dead_parts[i]
        scale_range(r, self.w_out, self.slot, b.first_node, b.first_node + b.n_nodes, self.chunk,
                    self.s, part)
        return math.fsum(part)

    def _prefetch(self, i: int) -> None:
        """Ask the OS to start reading block ``i``'s shard files now: when the store does not
        fit in the page cache, the disk reads overlap the gather of the block before it."""
        names = [layout.shard_offsets(i), layout.shard_sources(i)]
        if self.reader.weighted:
            names.append(layout.shard_weights(i))
        for name in names:
            try:
                fd = os.open(self.reader.path / name, os.O_RDONLY)
            except OSError:
                return  # not a local file (yet): the reader fetches it when the block is due
            try:
                os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_WILLNEED)
            finally:
                os.close(fd)

    def _gather(self, r: np.ndarray, i: int, dead_mass: float) -> float:
        b = self.blocks[i]
        sh = self._shard(i)
        if hasattr(os, "posix_fadvise"):
            # after the last block comes the next sweep's first
            self._prefetch((i + 1) % len(self.blocks))
        add_u, add_t = self.problem.constants(dead_mass)
        tele = self.problem.teleport
        v = self._no_v if tele.uniform else tele.fill_block(b.first_node, b.n_nodes, self._v_buf)
        w = self._no_w if sh.weights is None else np.asarray(sh.weights)
        part = self._res_parts[i]
        gather_block(np.asarray(sh.offsets), np.asarray(sh.sources), w, self.s, b.first_node,
                     self.problem.damping, add_u, add_t, v, self.chunk, r, part)
        return math.fsum(part)

    def power_step(self, r: np.ndarray, on_block: BlockHook | None = None) -> float:
        dead = [self._scale_block(r, i) for i in range(len(self.blocks))]
        dead_mass = math.fsum(dead)
        res = []
        for i in range(len(self.blocks)):
            res.append(self._gather(r, i, dead_mass))
            if on_block:
                on_block(i, len(self.blocks))
        return math.fsum(res)

    def gauss_seidel_sweep(self, r: np.ndarray, on_block: BlockHook | None = None) -> float:
        # Block Gauss-Seidel: a block's rows are computed from the vector as it stands (rows of
        # the same block see each other's old values), then the block is rescaled at once, so
        # every later block reads its fresh scores. Rows never read fresh rows of their own
        # block: that keeps the result independent of the thread schedule, and within a block
        # it is a tiny share of all reads.
        dead = [self._scale_block(r, i) for i in range(len(self.blocks))]
        res = []
        for i in range(len(self.blocks)):
            res.append(self._gather(r, i, math.fsum(dead)))
            dead[i] = self._scale_block(r, i)  # block i's fresh scores feed the blocks after it
            if on_block:
                on_block(i, len(self.blocks))
        return math.fsum(res)

    def close(self) -> None:
        # hand back s and the out-weight mapping (2 x 8N bytes) before the caller writes the
        # results: the run's peak memory is then the iteration's, not iteration plus output
        self.s = np.empty(0, dtype=np.float64)
        self.w_out = np.empty(0, dtype=np.float64)
        self.slot = np.empty(0, dtype=np.uint32)
        self._shards.clear()


EngineFactory = Callable[[StoreReader, Problem, RankOptions, Path], Engine]
"""``factory(reader, problem, options, run_dir) -> Engine``."""


def _local_engine(reader: StoreReader, problem: Problem, options: RankOptions, run_dir: Path) -> Engine:
    return LocalEngine(reader, problem, options.threads)


def _dask_engine(reader: StoreReader, problem: Problem, options: RankOptions, run_dir: Path) -> Engine:
    # imported only when asked for: the local engine needs neither dask nor fsspec
    try:
        from .dask_engine import DaskEngine
    except ImportError as e:
        if (e.name or "").split(".")[0] not in ("dask", "distributed", "fsspec"):
            raise
        raise BadInputError(f"--engine dask needs the package {e.name!r}, which is not installed",
                            hint="pip install 'shardrank[dask]'") from None
    return DaskEngine.from_options(reader, problem, options, run_dir)


# the one list of engines; `--engine NAME` picks one by name
ENGINES: dict[str, EngineFactory] = {"local": _local_engine, "dask": _dask_engine}
