"""What tonight's refresh has to do: nothing (up to date), publish or resume an unfinished
generation, or start a new one (reusing a store whose input fingerprint matches)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ..errors import ShardrankError
from ..ingest.build import BuildOptions
from ..results.result import read_run_json
from ..solve.checkpoint import CKPT_DIR
from ..store.manifest import StoreManifest, read_manifest
from . import generations as gens
from .fingerprint import teleport_hash
from .options import RefreshOptions


@dataclass
class Plan:
    kind: str  # "up-to-date" | "finish" (publish a finished run) | "resume" | "new"
    run: Path | None = None
    store: Path | None = None
    note: str = ""


def _store_matches(m: StoreManifest, fp: str, b: BuildOptions) -> bool:
    return m.input.get("fingerprint") == fp and m.options.get("id_width", "auto") == b.id_width


def _run_matches(home: Path, run: Path, fp: str, o: RefreshOptions) -> Path | None:
    """The store of ``run`` when the run answers tonight's question (same inputs, same options)."""
    try:
        doc = read_run_json(run)
        store = gens.store_of_run(home, run)
        if store is None or not _store_matches(read_manifest(store), fp, o.build):
            return None
        opts = doc["options"]
        ro = o.rank
        if (
            {k: opts.get(k) for k in ro.answer_options()} != ro.answer_options()
            or opts.get("teleport") != ro.teleport
            or opts.get("ignore_unknown_keys") != ro.ignore_unknown_keys
        ):
            return None
        if ro.teleport is not None and doc["teleport"]["hash"] != teleport_hash(store, ro):
            return None
        return store
    except (ShardrankError, KeyError, TypeError):
        return None


def make_plan(home: Path, fp: str, o: RefreshOptions, published: Path | None) -> Plan:
    if published is not None and (store := _run_matches(home, published, fp, o)) is not None:
        return Plan("up-to-date", published, store, "the published run already ranks this snapshot")
    newer = [
        g
        for g in gens.list_generations(home / gens.RUNS)
        if published is None or g.number > (gens.gen_number(published.name) or 0)
    ]
    if newer:
        run = newer[-1].path
        store = _run_matches(home, run, fp, o)
        if store is not None:
            status = read_run_json(run).get("status")
            if status in ("converged", "not-converged"):
                return Plan("finish", run, store, f"{run.name} finished but was not published")
            return Plan("resume", run, store, f"{run.name} was interrupted")
    return Plan("new")


def reusable_store(home: Path, fp: str, b: BuildOptions) -> Path | None:
    for g in reversed(gens.list_generations(home / gens.STORES)):
        try:
            if _store_matches(read_manifest(g.path), fp, b):
                return g.path
        except ShardrankError:
            continue
    return None


def checkpoint_iteration(run: Path) -> int:
    """Iteration of the newest checkpoint of a run (0: none, the run restarts from its start)."""
    nums = [int(p.name[5:]) for p in (run / CKPT_DIR).glob("iter-*") if p.name[5:].isdigit()]
    return max(nums, default=0)
