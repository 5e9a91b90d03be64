"""`shardrank refresh`: one unattended recomputation in a home directory.

Order of work (each step's seconds go into the summary)::

    lock        flock HOME/refresh.lock without waiting (BusyError, exit 75, if taken)
    fingerprint content fingerprint of the snapshot + the options that shape the store
                (with a delta instead of a snapshot: of the published store + the delta)
    plan        up to date? an unfinished generation to finish? else a new generation
    build       a new store generation, or reuse the newest store with the same fingerprint
                (with a delta: the published store patched, see ingest/patch.py)
    rank        warm-started by key from the published run, with checkpoints
                (an interrupted generation is resumed from its newest checkpoint instead)
    validate    converged within tol, mass 1, no NaN or negative score, node count as built
    compare     with the published run (by key); the optional guards look at this
    publish     HOME/current -> runs/gen-N by renaming a fresh symlink
    prune       keep the newest --keep generations, never the published run or its store

The summary (one JSON object) goes to ``on_summary`` and into ``RUN/refresh.json``. A run
that fails validation or a guard is kept, not published, and the matching error is raised
after the summary was delivered (exit 3, 4 or 5).
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from ..errors import (
    BadInputError,
    DamagedDataError,
    GuardFailedError,
    NotConvergedError,
    ShardrankError,
)
from ..ingest.build import build_store
from ..ingest.patch import patch_store
from ..progress import Reporter
from ..results.result import read_run_json
from ..solve.run import rank, resume
from ..store.atomic import write_json_atomic
from ..store.manifest import read_manifest
from . import generations as gens
from .checks import check_guards, cold_estimate, compare_with_previous, validate_run
from .fingerprint import check_same_schema, delta_fingerprint, input_fingerprint
from .hooks import PausePoint, PausingReporter
from .lock import HomeLock
from .options import RefreshOptions
from .plan import Plan, checkpoint_iteration, make_plan, reusable_store
from .publish import publish, published_run

REFRESH_JSON = "refresh.json"  # the summary, inside the run directory

Summary = dict[str, Any]


class _Clock:
    """Seconds per phase (a phase may run more than once; the times add up)."""

    def __init__(self) -> None:
        self.t0 = time.monotonic()
        self.seconds: dict[str, float] = {}

    @contextmanager
    def phase(self, name: str) -> Iterator[None]:
        t = time.monotonic()
        try:
            yield
        finally:
            self.seconds[name] = round(self.seconds.get(name, 0.0) + time.monotonic() - t, 4)

    def table(self) -> dict[str, float]:
        return {**self.seconds, "total": round(time.monotonic() - self.t0, 4)}


def _rel(home: Path, p: Path | None) -> str | None:
    return None if p is None else os.path.relpath(p.resolve(), home.resolve())


def _previous_summary(run: Path | None) -> Summary:
    if run is None:
        return {}
    try:
        d = json.loads((run / REFRESH_JSON).read_text())
        return d if isinstance(d, dict) else {}
    except (OSError, ValueError):
        return {}


def refresh(
    edges: Sequence[str | os.PathLike[str]],
    home: str | os.PathLike[str],
    options: RefreshOptions | None = None,
    reporter: Reporter | None = None,
    on_summary: Callable[[Summary], None] | None = None,
    add: Sequence[str | os.PathLike[str]] = (),
    remove: Sequence[str | os.PathLike[str]] = (),
) -> Summary:
    """Recompute the ranking of a new snapshot in ``home`` and publish it as ``home/current``.

    Parameters
    ----------
    edges : edge files, directories or globs (as for :func:`shardrank.build_store`); empty
        when the night's change comes as a delta (``add``/``remove``)
    add, remove : a delta instead of a snapshot: edge tables added and removed since the
        published run's graph; the published store is patched (:func:`shardrank.patch_store`)
        instead of building from a whole snapshot. Needs a published run (an unweighted store
        built without --nodes). Running the same delta again finds the result up to date.
    home : the refresh home (created if missing); readers use ``home/current/scores.parquet``
    options : :class:`RefreshOptions`
    reporter : progress and events
    on_summary : called with the summary before a failing result raises

    Returns
    -------
    dict
        The summary (also in ``RUN/refresh.json``).

    Raises
    ------
    BusyError
        Another refresh holds the lock of ``home`` (exit 75).
    GuardFailedError, NotConvergedError, DamagedDataError
        The new run is kept but not published (exit 5, 3, 4).
    BadInputError
        Bad snapshot or options; nothing is published.
    """
    o = options or RefreshOptions()
    o.validate()
    if bool(edges) == bool(add or remove):
        raise BadInputError(
            "give the night's input either as a snapshot (--edges) or as a delta (--add/--remove)",
            hint="--edges SOURCE... for a whole snapshot; --add FILE... and/or --remove FILE... "
            "for the change since the published run",
        )
    rep = reporter or Reporter()
    home_p = Path(home)
    home_p.mkdir(parents=True, exist_ok=True)
    clock = _Clock()
    with clock.phase("lock"):
        lock = HomeLock(home_p)
        lock.acquire()
    try:
        return _refresh_locked(edges, home_p, o, rep, clock, on_summary, list(add), list(remove))
    finally:
        lock.release()


def _refresh_locked(
    edges: Sequence[str | os.PathLike[str]],
    home: Path,
    o: RefreshOptions,
    rep0: Reporter,
    clock: _Clock,
    on_summary: Callable[[Summary], None] | None,
    add: list[str | os.PathLike[str]],
    remove: list[str | os.PathLike[str]],
) -> Summary:
    pause = PausePoint(home)
    rep = PausingReporter(rep0, pause)
    for name in gens.clean_leftovers(home):
        rep.event("cleanup", f"removed {name}, left by an interrupted refresh")
    published = published_run(home)
    pstore = gens.store_of_run(home, published) if published is not None else None
    base: Path | None = None  # the store a delta patches
    with clock.phase("fingerprint"):
        if add or remove:
            rep.event("phase", "fingerprinting the delta...", phase="fingerprint")
            if pstore is None:
                raise BadInputError(
                    f"{home}: a delta (--add/--remove) patches the published run's store, and "
                    "there is none yet",
                    hint="run the first refresh with --edges (a whole snapshot)",
                )
            base = pstore
            fp = delta_fingerprint(read_manifest(pstore), add, remove)
        else:
            rep.event("phase", "fingerprinting the snapshot...", phase="fingerprint")
            snap = input_fingerprint(edges, o.build)
            fp = snap.fingerprint
            if pstore is not None:
                check_same_schema(snap, o.build, read_manifest(pstore))
    plan = make_plan(home, fp, o, published)
    if plan.note:
        rep.event("plan", plan.note)
    if plan.kind == "up-to-date":
        return _up_to_date(home, plan, fp, o, clock, on_summary)
    resumed: dict[str, Any] | None = {"phase": "publish"} if plan.kind == "finish" else None
    reused = False
    if plan.kind == "resume":
        assert plan.run is not None
        resumed = {"phase": "rank", "from_iteration": checkpoint_iteration(plan.run)}
        try:
            with clock.phase("rank"):
                resume(plan.run, rep, store=plan.store, threads=o.rank.threads)
        except BadInputError as e:
            resumed = None
            rep.event(
                "warning", f"cannot resume {plan.run.name} ({e.message}); starting a new generation"
            )
            plan = Plan("new")
    if plan.kind == "new":
        number = gens.next_number(home)
        store = reusable_store(home, fp, o.build)
        if store is not None:
            reused = True
            rep.event("reuse", f"the snapshot is unchanged since {store.name}: reusing that store")
        else:
            store = home / gens.STORES / gens.gen_name(number)
            with clock.phase("build"):
                rep.building = store
                if base is not None:
                    patch_store(base, store, add, remove, reporter=rep, src=o.build.src,
                                dst=o.build.dst, threads=o.build.threads)
                else:
                    build_store(edges, store, replace(o.build, overwrite=False), rep)
                rep.building = None
        run = home / gens.RUNS / gens.gen_name(number)
        ro = replace(o.rank, init=str(published) if published is not None else None)
        with clock.phase("rank"):
            rank(store, run, ro, rep)
        plan = Plan("new", run, store)
    assert plan.run is not None and plan.store is not None
    return _conclude(
        home, plan, fp, o, published, rep, pause, clock, on_summary, reused=reused, resumed=resumed
    )


def _up_to_date(
    home: Path,
    plan: Plan,
    fp: str,
    o: RefreshOptions,
    clock: _Clock,
    on_summary: Callable[[Summary], None] | None,
) -> Summary:
    assert plan.run is not None
    with clock.phase("prune"):
        pruned = gens.prune(home, o.keep, [plan.run])
    doc = read_run_json(plan.run)
    summary: Summary = {
        "refresh": "up-to-date",
        "published": True,
        "reasons": [],
        "home": str(home.resolve()),
        "generation": gens.gen_number(plan.run.name),
        "run": _rel(home, plan.run),
        "store": _rel(home, plan.store),
        "input_fingerprint": fp,
        "nodes": doc.get("n_nodes"),
        "edges": doc.get("n_edges"),
        "error_bound": doc.get("error_bound"),
        "tol": doc.get("tol"),
        "seconds": clock.table(),
        "pruned": pruned,
        "finished": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    if not (plan.run / REFRESH_JSON).exists():  # a crash right after publishing lost it
        write_json_atomic(plan.run / REFRESH_JSON, summary)
    if on_summary:
        on_summary(summary)
    return summary


def _conclude(
    home: Path,
    plan: Plan,
    fp: str,
    o: RefreshOptions,
    published: Path | None,
    rep: Reporter,
    pause: PausePoint,
    clock: _Clock,
    on_summary: Callable[[Summary], None] | None,
    reused: bool,
    resumed: dict[str, Any] | None,
) -> Summary:
    run, store = plan.run, plan.store
    assert run is not None and store is not None
    manifest = read_manifest(store)
    with clock.phase("validate"):
        slow, bad, r = validate_run(run, manifest.n_nodes)
    comparison: dict[str, Any] | None = None
    reasons = slow + bad
    if published is not None and r is not None and published.resolve() != run.resolve():
        with clock.phase("compare"):
            try:
                comparison = compare_with_previous(
                    published, run, o.min_overlap[0] if o.min_overlap else None
                )
            except ShardrankError as e:
                comparison = {"error": e.message}
            comparison["run"] = _rel(home, published)
    if (
        comparison is not None
        and "error" in comparison
        and (o.max_l1 is not None or o.min_overlap is not None)
    ):
        guards: dict[str, Any] = {"error": comparison["error"]}
        reasons.append(
            f"cannot compare with the published run, so the guards cannot pass: {comparison['error']}"
        )
    else:
        guards, guard_reasons = check_guards(comparison, o.max_l1, o.min_overlap)
        reasons += guard_reasons
    ok = not reasons
    if ok:
        with clock.phase("publish"):
            rep.event("phase", f"publishing {run.name} as {home / gens.CURRENT}", phase="publish")
            publish(home, run, lambda: pause.reached("publish"))
    with clock.phase("prune"):
        now_published = published_run(home)
        pruned = gens.prune(home, o.keep, [p for p in (now_published,) if p is not None])
    doc = read_run_json(run)
    prev = _previous_summary(published)
    warm = doc.get("init", {}).get("kind") == "warm"
    iterations: dict[str, Any] = {
        "start": "warm" if warm else "cold",
        "count": doc.get("iterations"),
    }
    if r is not None:
        est = cold_estimate(doc, r)
        iterations["cold_estimate"] = est
        if est and warm and doc.get("iterations"):
            iterations["ratio_to_cold_estimate"] = round(int(doc["iterations"]) / est, 3)
    last_cold = (
        {
            "generation": gens.gen_number(run.name),
            "iterations": doc.get("iterations"),
            "edges": doc.get("n_edges"),
        }
        if not warm
        else prev.get("iterations", {}).get("last_cold")
    )
    if last_cold:
        iterations["last_cold"] = last_cold
    summary: Summary = {
        "refresh": "published" if ok else "rejected",
        "published": ok,
        "reasons": reasons,
        "home": str(home.resolve()),
        "generation": gens.gen_number(run.name),
        "run": _rel(home, run),
        "store": _rel(home, store),
        "store_reused": reused,
        "resumed": resumed,
        "input_fingerprint": fp,
        "nodes": doc.get("n_nodes"),
        "edges": doc.get("n_edges"),
        "iterations": iterations,
        "converged": doc.get("converged"),
        "error_bound": doc.get("error_bound"),
        "tol": doc.get("tol"),
        "previous": comparison,
        "guards": guards,
        "seconds": clock.table(),
        "rank_seconds": doc.get("timings", {}).get("iterate_seconds"),
        "pruned": pruned,
        "finished": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    write_json_atomic(run / REFRESH_JSON, summary)
    if on_summary:
        on_summary(summary)
    where = f"{run} is kept, not published; {home / gens.CURRENT} still points at the previous run"
    if bad:
        raise DamagedDataError(
            f"{run.name} failed validation: {'; '.join(bad)}",
            hint=f"{where}; check the disk and the store with `shardrank verify`",
        )
    if slow:
        raise NotConvergedError(
            f"{run.name}: {'; '.join(slow)}",
            hint=f"{where}; refresh again with a larger --max-iter or a looser --tol",
        )
    if reasons:
        raise GuardFailedError(
            f"{run.name} failed a publishing guard: {'; '.join(reasons)}",
            hint=f"{where}; inspect it, then rerun with looser guards to publish it",
        )
    return summary
