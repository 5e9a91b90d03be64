"""What a Dask worker runs: one shard's gather, with the same kernels as the local engine.

A task reads only immutable inputs: the store (checked against its fingerprint) and the files
the driver wrote for this step (see :mod:`shardrank.solve.dask_engine`). It returns its block's
new scores and the per-chunk residual partials and writes nothing, so running it twice (a
retry, or a lost worker's task run again elsewhere) gives the same bytes.

Per worker process, small caches avoid repeated work: opened stores, vectors fetched from a
non-local exchange, and the Gauss-Seidel sweep's scaled-score vector (fresh blocks are applied
to it as the chain of block tasks moves on).
"""

from __future__ import annotations

import io
import tempfile
import threading
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

import numba
import numpy as np

from ..errors import DamagedDataError
from ..kernels import gather_block, n_chunks
from ..store import urls
from ..store.reader import Shard, StoreReader

_NO_ARRAY = np.empty(0, dtype=np.float64)
_LOCK = threading.RLock()  # re-entered: the sweep vector is built from fetched vectors
_READERS: dict[tuple[str, str], StoreReader] = {}
_VECTORS: OrderedDict[str, np.ndarray] = OrderedDict()  # non-local exchange files, newest last
_VECTORS_KEPT = 3
_SWEEP: dict[str, tuple[np.ndarray, int]] = {}  # step dir -> (scaled scores, fresh blocks applied)


@dataclass(frozen=True)
class StepJob:
    """What every task of one step needs (small; sent with each task)."""

    store: str  # absolute path or URL
    fingerprint: str
    step_dir: str  # absolute path or URL of EXCHANGE/<session>/step-NNNNNN
    n_nodes: int
    damping: float
    chunk: int
    threads: int  # numba threads inside one task; 0: 1 in a power step, every core in a sweep
    firsts: tuple[int, ...]  # first node of every block (Gauss-Seidel applies fresh blocks)


@dataclass(frozen=True)
class BlockTask:
    """One destination block of one step."""

    index: int
    first: int
    n_nodes: int
    add_uniform: float
    add_teleport: float
    teleport_ids: np.ndarray | None  # block-local ids of the teleport entries in this block
    teleport_values: np.ndarray | None


def step_file(step_dir: urls.Location, kind: str, block: int | None = None) -> urls.Location:
    """``s.npy`` (scaled scores), ``r-NNNNNN.npy`` (old block scores), ``fresh-NNNNNN.npy``."""
    return step_dir.child(f"{kind}.npy" if block is None else f"{kind}-{block:06d}.npy")


def _cache_dir() -> Path:
    try:
        from distributed import get_worker

        return Path(get_worker().local_directory) / "shardrank-stores"
    except ValueError:  # not inside a worker (e.g. a task run in the driver for a test)
        return Path(tempfile.gettempdir()) / "shardrank-stores"


def _reader(job: StepJob) -> StoreReader:
    key = (job.store, job.fingerprint)
    with _LOCK:
        r = _READERS.get(key)
        if r is None:
            r = urls.open_store(job.store, cache=_cache_dir())
            if r.fingerprint != job.fingerprint:
                raise DamagedDataError(
                    f"{job.store}: the store this worker sees is not the one the driver "
                    "opened (fingerprints differ)",
                    hint="every worker must see the same store; was it rebuilt during the run?",
                )
            _READERS[key] = r
        return r


def probe(store: str, fingerprint: str, probe_file: str, expect: bytes) -> str | None:
    """Run on every worker before the first step: None if it can open the store and read the
    exchange as the driver does, else what went wrong."""
    try:
        r = urls.open_store(store, cache=_cache_dir())
        if r.fingerprint != fingerprint:
            return f"{store} is another store here (fingerprint {r.fingerprint[:12]}...)"
        if urls.read_bytes(urls.parse_location(probe_file)) != expect:
            return f"{probe_file} holds other bytes here"
    except Exception as e:  # reported to the driver, which raises one error for all workers
        return f"{type(e).__name__}: {e}"
    return None


def _vector(loc: urls.Location) -> np.ndarray:
    """A float64 vector the driver wrote: memory-mapped when local, else fetched once per worker."""
    if loc.local is not None:
        # copy-on-write mapping: shares the page cache like "r", and, being writable, gives the
        # kernels the same array types as the local engine's (one compiled version, not two)
        return np.asarray(np.load(loc.local, mmap_mode="c", allow_pickle=False))
    with _LOCK:
        v = _VECTORS.get(loc.url)
        if v is None:
            v = np.load(io.BytesIO(urls.read_bytes(loc)), allow_pickle=False)
            _VECTORS[loc.url] = v
            while len(_VECTORS) > _VECTORS_KEPT:
                _VECTORS.popitem(last=False)
        return v


def _teleport_block(t: BlockTask) -> np.ndarray:
    """The teleport distribution on the block, as :meth:`Teleport.fill_block` builds it."""
    if t.teleport_ids is None or t.teleport_values is None:
        return _NO_ARRAY
    v = np.zeros(t.n_nodes, dtype=np.float64)
    v[t.teleport_ids] = t.teleport_values
    return v


def _arrays(sh: Shard) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    w = _NO_ARRAY if sh.weights is None else np.asarray(sh.weights)
    return np.asarray(sh.offsets), np.asarray(sh.sources), w


def _cores() -> int:
    return int(numba.config.NUMBA_NUM_THREADS)  # type: ignore[attr-defined]


def _set_threads(n: int) -> None:
    numba.set_num_threads(max(1, min(n, _cores())))


def _default_threads(sweep: bool) -> int:
    # power steps run one task per worker thread at once: one kernel thread each; a sweep's
    # chain runs one task at a time on the whole cluster, so that task takes every core
    return _cores() if sweep else 1


def _gather(
    job: StepJob, t: BlockTask, step: urls.Location, s: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Block ``t``'s new scores gathered from the scaled scores ``s``; (scores, partials)."""
    offsets, sources, w = _arrays(_reader(job).shard(t.index))
    r_block = np.array(
        _vector(step_file(step, "r", t.index)), dtype=np.float64
    )  # private, writable
    part = np.zeros(n_chunks(t.n_nodes, job.chunk))
    # first=0: the kernel indexes r_inout by first + row, and r_block holds only this block
    gather_block(
        offsets,
        sources,
        w,
        s,
        0,
        job.damping,
        t.add_uniform,
        t.add_teleport,
        _teleport_block(t),
        job.chunk,
        r_block,
        part,
    )
    return r_block, part


def power_block(job: StepJob, t: BlockTask) -> tuple[np.ndarray, np.ndarray]:
    """New scores of block ``t`` from the step's scaled scores; (scores, residual partials)."""
    _set_threads(job.threads or _default_threads(sweep=False))
    step = urls.parse_location(job.step_dir)
    return _gather(job, t, step, _vector(step_file(step, "s")))


def _sweep_vector(job: StepJob, step: urls.Location, block: int) -> np.ndarray:
    """Scaled scores at the start of the sweep with blocks ``0 .. block-1`` replaced by their
    fresh values; kept per worker and extended as the chain of block tasks moves on."""
    with _LOCK:
        entry = _SWEEP.get(job.step_dir)
        if entry is None or entry[1] > block:
            entry = (np.array(_vector(step_file(step, "s")), dtype=np.float64), 0)
        s, applied = entry
        slot = _reader(job).read_slot()
        for i in range(applied, block):
            fresh = _vector(step_file(step, "fresh", i))
            ids = slice(job.firsts[i], job.firsts[i] + fresh.shape[0])
            if slot is None:
                s[ids] = fresh
            else:
                s[np.asarray(slot[ids], dtype=np.int64)] = fresh
        _SWEEP.clear()  # one sweep at a time: older steps are finished
        _SWEEP[job.step_dir] = (s, block)
        return s


def sweep_block(job: StepJob, t: BlockTask) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Seidel update of block ``t``, seeing the fresh scores of every block before it."""
    _set_threads(job.threads or _default_threads(sweep=True))
    step = urls.parse_location(job.step_dir)
    # the power step's gather, over a vector in which blocks < t are fresh
    return _gather(job, t, step, _sweep_vector(job, step, t.index))
