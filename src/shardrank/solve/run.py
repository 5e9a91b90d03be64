"""Rank a store into a run directory, and resume a stopped run.

Order of work: validate options, open and verify the store, write run.json (status
"running"), build the teleport and the start vector, iterate with checkpoints, write
scores.npy and scores.parquet, and rewrite run.json with the outcome.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import resource
import shutil
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .. import settings
from ..errors import BadInputError
from ..progress import Reporter
from ..results import runfiles
from ..results.result import RankResult, read_run_json
from ..store import urls
from ..store.atomic import fsync_dir, write_json_atomic, write_npy_atomic
from ..store.reader import StoreReader
from .checkpoint import CKPT_DIR, IterState, load_checkpoint, write_checkpoint
from .driver import iterate
from .engine import ENGINES, Engine
from .options import RankOptions
from .problem import Problem, Teleport
from .tables import load_init, load_teleport


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def _vec_hash(*arrays: np.ndarray) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(np.ascontiguousarray(a).tobytes())
    return h.hexdigest()


def _peak_rss() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _teleport(reader: StoreReader, o: RankOptions, rep: Reporter) -> tuple[Teleport, dict[str, Any]]:
    n = reader.n_nodes
    if o.teleport is None:
        return Teleport(n), {"kind": "uniform", "hash": "uniform"}
    ids, vals, n_unknown = load_teleport(reader, o.teleport, o.ignore_unknown_keys)
    if n_unknown:
        rep.event("warning", f"teleport: ignored {n_unknown:,} keys that are not nodes of the store")
    info = {"kind": "table", "path": str(o.teleport), "entries": int(ids.size),
            "unknown_keys_ignored": n_unknown, "hash": _vec_hash(ids, vals)}
    return Teleport(n, ids, vals), info


def _start_vector(reader: StoreReader, o: RankOptions, tele: Teleport, rep: Reporter) -> tuple[np.ndarray, dict[str, Any]]:
    n = reader.n_nodes
    if o.init is None:
        return np.full(n, 1.0 / n), {"kind": "uniform"}
    ids, vals, n_unknown = load_init(reader, o.init)
    # nodes the earlier result lacks start at their teleport value; vanished keys are dropped
    r = tele.dense()
    r[ids] = vals
    total = float(r.sum())
    if not total > 0:
        raise BadInputError(f"{o.init}: the warm-start scores of the store's keys sum to zero",
                            hint="pass a run or table with positive scores, or omit --init")
    r /= total
    info = {"kind": "warm", "path": str(o.init), "matched": int(ids.size), "new_nodes": int(n - ids.size),
            "vanished_keys": n_unknown, "hash": _vec_hash(r)}
    rep.event("init", f"warm start from {o.init}: {ids.size:,} keys matched, {n - ids.size:,} new, "
              f"{n_unknown:,} vanished")
    return r, info


def _write_scores_parquet(reader: StoreReader, r: np.ndarray, path: Path) -> None:
    """key, score in id order, streamed from nodes.parquet (bounded memory), published atomically."""
    tmp = path.with_name(path.name + ".partial")
    pf = pq.ParquetFile(reader.nodes_path())
    schema = pa.schema([("key", pf.schema_arrow.field("key").type), ("score", pa.float64())])
    pos = 0
    with pq.ParquetWriter(tmp, schema, compression="zstd") as w:
        for batch in pf.iter_batches(batch_size=settings.BATCH_ROWS, columns=["key"]):
            n = batch.num_rows
            w.write_batch(pa.record_batch([batch.column(0), pa.array(r[pos : pos + n])], schema=schema))
            pos += n
    with open(tmp, "rb") as f:
        os.fsync(f.fileno())
    os.replace(tmp, path)
    fsync_dir(path.parent)


class _Run:
    """Shared machinery of rank() and resume()."""

    def __init__(self, run: Path, reader: StoreReader, o: RankOptions, rep: Reporter, doc: dict[str, Any]):
        self.run, self.reader, self.o, self.rep, self.doc = run, reader, o, rep, doc

    def save_doc(self) -> None:
        write_json_atomic(self.run / runfiles.RUN_JSON, self.doc)

    def execute(self, r: np.ndarray, state: IterState, tele: Teleport) -> RankResult:
        o, rep, reader = self.o, self.rep, self.reader
        problem = Problem(o.damping, tele, o.dead_ends)
        try:
            factory = ENGINES[o.engine]
        except KeyError:
            raise BadInputError(f"--engine {o.engine!r} is not one of {', '.join(ENGINES)}") from None
        try:
            engine: Engine = factory(reader, problem, o, self.run)
        except BaseException:
            if "resumed" not in self.doc:  # a new run that could not start leaves nothing behind
                (self.run / runfiles.RUN_JSON).unlink(missing_ok=True)
                with contextlib.suppress(OSError):
                    self.run.rmdir()
            raise
        meta = {"store_fingerprint": reader.fingerprint, "answer_options": o.answer_options(),
                "teleport_hash": self.doc["teleport"]["hash"]}

        def checkpoint(vec: np.ndarray, st: IterState) -> None:
            write_checkpoint(self.run, vec, st, meta)
            rep.event("checkpoint", f"checkpoint at iteration {st.iteration}", iteration=st.iteration)

        t0 = time.monotonic()
        start_iter = state.iteration
        try:
            state = iterate(engine, r, state, o, rep, checkpoint)
        except KeyboardInterrupt:
            checkpoint(r, state)
            raise
        finally:
            engine.close()
        rep.done()
        t_iter = time.monotonic() - t0
        t1 = time.monotonic()
        n_bytes, sha = write_npy_atomic(self.run / runfiles.SCORES_NPY, r)
        _write_scores_parquet(reader, r, self.run / runfiles.SCORES_PARQUET)
        t_write = time.monotonic() - t1
        done_iters = state.iteration - start_iter
        self.doc.update({
            "status": "converged" if state.converged else "not-converged",
            "exit_status": 0 if state.converged else 3,
            "finished": _now(),
            "iterations": state.iteration,
            "converged": state.converged,
            "error_bound": state.error_bound,
            "tol": o.tol,
            "history": {"residual": state.residuals, "error_bound": state.bounds, "step": state.steps},
            "scores": {"bytes": n_bytes, "sha256": sha},
            "threads": getattr(engine, "threads", None),
        })
        tm = self.doc.setdefault("timings", {})
        tm["iterate_seconds"] = round(tm.get("iterate_seconds", 0.0) + t_iter, 4)
        tm["write_seconds"] = round(t_write, 4)
        tm["seconds_per_iteration"] = round(t_iter / done_iters, 6) if done_iters else None
        tm["edges_per_second"] = round(reader.n_edges * done_iters / t_iter) if t_iter > 0 and done_iters else None
        self.doc["peak_memory_bytes"] = _peak_rss()
        self.save_doc()
        shutil.rmtree(self.run / CKPT_DIR, ignore_errors=True)
        msg = (f"{'converged' if state.converged else 'NOT converged'} after {state.iteration} iterations; "
               f"L1 error bound {state.error_bound:.3e} (tol {o.tol:g})")
        rep.event("done", msg, iterations=state.iteration, converged=state.converged, error_bound=state.error_bound)
        return RankResult(self.run, r, None, self.doc)


def rank(store: str | Path, out: str | Path, options: RankOptions | None = None,
         reporter: Reporter | None = None, overwrite: bool = False) -> RankResult:
    """Rank the nodes of a store; write the run into ``out``. Check ``result.converged``."""
    o = options or RankOptions()
    rep = reporter or Reporter()
    o.validate()
    if o.engine not in ENGINES:
        raise BadInputError(f"--engine {o.engine!r} is not one of {', '.join(ENGINES)}")
    run = Path(out)
    if run.exists() and any(run.iterdir()):
        if not overwrite:
            raise BadInputError(f"{run} already exists and is not empty",
                                hint="pass --overwrite, pick another --out, or `shardrank resume` it")
    t0 = time.monotonic()
    reader = urls.open_store(store)
    rep.event("phase", f"verifying {reader.n_edges:,} edges in {reader.n_blocks} blocks...", phase="verify")
    reader.verify_checksums()
    tele, tele_info = _teleport(reader, o, rep)
    r, init_info = _start_vector(reader, o, tele, rep)
    t_open = time.monotonic() - t0
    if run.exists() and overwrite:
        shutil.rmtree(run)
    run.mkdir(parents=True, exist_ok=True)
    doc: dict[str, Any] = {
        "format": settings.RUN_FORMAT, "version": settings.RUN_FORMAT_VERSION, "status": "running",
        "created": _now(), "options": o.to_json(),
        "store": {"path": urls.describe(store), "fingerprint": reader.fingerprint},
        "n_nodes": reader.n_nodes, "n_edges": reader.n_edges,
        "teleport": tele_info, "init": init_info, "timings": {"open_seconds": round(t_open, 4)},
    }
    job = _Run(run, reader, o, rep, doc)
    job.save_doc()
    rep.event("phase", f"ranking {reader.n_nodes:,} nodes ({o.method}, damping {o.damping}, tol {o.tol:g})")
    return job.execute(r, IterState(), tele)


def resume(run: str | Path, reporter: Reporter | None = None, store: str | Path | None = None,
           threads: int | None = None, expect: RankOptions | None = None,
           scheduler: str | None = None) -> RankResult:
    """Continue a stopped run from its newest checkpoint that verifies.

    ``scheduler`` moves a Dask run to another scheduler address (the cluster was restarted).
    """
    rep = reporter or Reporter()
    p = Path(run)
    doc = read_run_json(p)
    if doc.get("status") in ("converged", "not-converged"):
        raise BadInputError(f"{p}: the run already finished ({doc['status']})",
                            hint="rank again (e.g. with --init) to compute a new result")
    known = set(RankOptions.__dataclass_fields__)
    o = RankOptions(**{k: v for k, v in doc["options"].items() if k in known})
    if threads is not None:
        o.threads = threads
    if scheduler is not None:
        if o.engine != "dask":
            raise BadInputError(f"{p}: --scheduler applies to Dask runs; this run used --engine {o.engine}")
        o.scheduler, o.workers = scheduler, None
        doc["options"].update(scheduler=scheduler, workers=None)
    if expect is not None and expect.answer_options() != o.answer_options():
        diff = {k: (v, o.answer_options()[k]) for k, v in expect.answer_options().items() if o.answer_options()[k] != v}
        raise BadInputError(f"{p}: options differ from the run's ({', '.join(f'{k}: {a} vs {b}' for k, (a, b) in diff.items())})",
                            hint="resume with the run's own options, or rank into a new directory")
    store_path = str(store) if store is not None else doc["store"]["path"]
    reader = urls.open_store(store_path)
    reader.verify_checksums()
    if reader.fingerprint != doc["store"]["fingerprint"]:
        raise BadInputError(f"{store_path}: the store changed since the run started (fingerprint differs)",
                            hint="rank the new store into a new run, with --init to warm-start")
    tele, tele_info = _teleport(reader, o, rep)
    if tele_info["hash"] != doc["teleport"]["hash"]:
        raise BadInputError(f"{o.teleport}: the teleport table changed since the run started",
                            hint="rank into a new run instead")
    skipped: list[str] = []
    loaded = load_checkpoint(p, reader.n_nodes, skipped)
    if loaded is None:
        for pr in skipped:
            rep.event("warning", f"skipped damaged checkpoint {pr}")
        rep.event("resume", "no usable checkpoint: starting over from the first iteration")
        r, init_info = _start_vector(reader, o, tele, rep)
        state = IterState()
    else:
        r, state, meta, problems = loaded
        for pr in problems:
            rep.event("warning", f"skipped damaged checkpoint {pr}")
        if meta.get("store_fingerprint") != reader.fingerprint or meta.get("answer_options") != o.answer_options():
            raise BadInputError(f"{p}: the checkpoint was made with another store or options",
                                hint="rank into a new run instead")
        rep.event("resume", f"resuming at iteration {state.iteration} from its checkpoint")
    doc["resumed"] = doc.get("resumed", 0) + 1
    doc["options"]["threads"] = o.threads
    job = _Run(p, reader, o, rep, doc)
    return job.execute(r, state, tele)


__all__ = ["rank", "resume"]
