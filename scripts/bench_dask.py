#!/usr/bin/env python3
"""The Dask engine on a LocalCluster against the local engine, on one store.

Each run is `shardrank rank` in a subprocess (what a user runs), to the same --tol, for each
method. The Dask runs use a LocalCluster this script starts (N worker processes, one thread
each; a new one for each run, so each worker's peak memory is its own run's).
Printed per run: iterations, iterate seconds (run.json), seconds per iteration, the ratio to
the local engine, driver and worker peak memory, and whether the scores are bitwise equal.

A second table times single steps in this process through the engine API (the engines the
runs use): the first step (workers load the kernels and page in their shards), the best and
median of the next --steps steps, so warm-up and steady state are told apart.

usage: scripts/bench_dask.py [--store /work/bench-data/s22] [--workers 2] [--tol 1e-9]
                             [--methods power,gauss-seidel] [--out /tmp/bench-dask]
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import resource
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

CLI = str(Path(sys.executable).with_name("shardrank"))


def _worker_peak_rss() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def _rank(store: str, run: Path, method: str, tol: float, extra: list[str]) -> dict[str, Any]:
    shutil.rmtree(run, ignore_errors=True)
    t0 = time.monotonic()
    p = subprocess.run(
        [
            CLI,
            "rank",
            store,
            "--out",
            str(run),
            "--method",
            method,
            "--tol",
            str(tol),
            "--log-format",
            "json",
            *extra,
        ],
        capture_output=True,
        text=True,
    )
    wall = time.monotonic() - t0
    if p.returncode not in (0, 3):
        sys.exit(f"rank failed (exit {p.returncode}):\n{p.stderr[-3000:]}")
    doc = json.loads((run / "run.json").read_text())
    return {
        "wall": wall,
        "iterations": doc["iterations"],
        "iterate": doc["timings"]["iterate_seconds"],
        "per_iter": doc["timings"]["seconds_per_iteration"],
        "driver_rss": doc["peak_memory_bytes"],
        "bound": doc["error_bound"],
        "converged": doc["converged"],
    }


def _steps(engine: Any, method: str, r: np.ndarray, n: int) -> tuple[float, float, float]:
    """(first step, best and median of the next n) in seconds; ``r`` advances in place.

    The best is the least disturbed by other work on the machine (it is shared)."""
    times = []
    for _ in range(n + 1):
        t0 = time.perf_counter()
        if method == "power":
            engine.power_step(r)
        else:
            engine.gauss_seidel_sweep(r)
        times.append(time.perf_counter() - t0)
        r /= r.sum()
    return times[0], min(times[1:]), float(np.median(times[1:]))


def _steady(store: str, address: str, out: Path, methods: list[str], n: int) -> list[str]:
    from shardrank.solve.dask_engine import DaskEngine
    from shardrank.solve.engine import LocalEngine
    from shardrank.solve.options import RankOptions
    from shardrank.solve.problem import Problem, Teleport
    from shardrank.store.urls import open_store

    reader = open_store(store)
    problem = Problem(0.85, Teleport(reader.n_nodes), "teleport")
    lines = []
    for method in methods:
        start = np.full(reader.n_nodes, 1.0 / reader.n_nodes)
        r_loc, r_dk = start.copy(), start.copy()
        loc = _steps(LocalEngine(reader, problem), method, r_loc, n)
        dk = DaskEngine.from_options(
            reader, problem, RankOptions(engine="dask", scheduler=address), out / "steady"
        )
        try:
            dkt = _steps(dk, method, r_dk, n)
        finally:
            dk.close()
        same = "yes" if np.array_equal(r_loc, r_dk) else "NO"
        cells = " | ".join(f"{x:.3f}" for x in (*loc, *dkt))
        lines.append(f"| {method} | {cells} | {dkt[1] / loc[1]:.2f}x | {same} |")
        print(json.dumps({"steady": method, "local": loc, "dask": dkt}), flush=True)
    return lines


@contextmanager
def _cluster(n: int) -> Iterator[tuple[Any, Any]]:
    import distributed

    t0 = time.monotonic()
    cluster = distributed.LocalCluster(
        n_workers=n,
        threads_per_worker=1,
        processes=True,
        dashboard_address="127.0.0.1:0",
        silence_logs=logging.ERROR,
    )
    client = distributed.Client(cluster, set_as_default=False)
    client.wait_for_workers(n)
    print(f"LocalCluster: {n} workers x 1 thread, up in {time.monotonic() - t0:.1f} s", flush=True)
    try:
        yield cluster, client
    finally:
        client.close()
        cluster.close()


def _load() -> str:
    return "load average " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def main() -> int:
    ap = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    ap.add_argument("--store", default="/work/bench-data/s22")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--tol", type=float, default=1e-9)
    ap.add_argument("--methods", default="power,gauss-seidel")
    ap.add_argument("--out", default="/tmp/bench-dask")
    ap.add_argument("--steps", type=int, default=6, help="steps timed after the first (0: skip)")
    ap.add_argument("--no-runs", action="store_true", help="only the single-step table")
    ap.add_argument(
        "--repeat", type=int, default=1, help="runs per engine and method; the best is shown"
    )
    a = ap.parse_args()
    from shardrank.store.urls import open_store

    reader = open_store(a.store)
    print(
        f"store {a.store}: {reader.n_nodes:,} nodes, {reader.n_edges:,} edges, "
        f"{reader.n_blocks} blocks of {reader.manifest.block_nodes:,} nodes",
        flush=True,
    )
    out = Path(a.out)
    out.mkdir(parents=True, exist_ok=True)
    rows = []
    steady: list[str] = []
    print(_load(), flush=True)
    # the runs come first: a child process reports the larger of its own peak and this
    # process's size when it was forked, so this process must still be small then
    for method in [] if a.no_runs else a.methods.split(","):
        best: dict[str, dict[str, Any]] = {}
        all_equal = True
        for _ in range(a.repeat):  # local and dask alternate, so both see similar load
            loc = _rank(a.store, out / f"local-{method}", method, a.tol, [])
            with _cluster(a.workers) as (cluster, client):  # fresh workers: their own peak
                dk = _rank(
                    a.store,
                    out / f"dask-{method}",
                    method,
                    a.tol,
                    ["--engine", "dask", "--scheduler", cluster.scheduler_address],
                )
                dk["worker_rss"] = max(client.run(_worker_peak_rss).values())
            x = np.load(out / f"local-{method}" / "scores.npy")
            y = np.load(out / f"dask-{method}" / "scores.npy")
            dk["bitwise"] = bool(np.array_equal(x, y))
            all_equal = all_equal and dk["bitwise"]
            dk["max_diff"] = float(np.abs(x - y).max())
            for name, r in (("local", loc), ("dask", dk)):
                print(json.dumps({"engine": name, "method": method, **r}), flush=True)
                if name not in best or r["iterate"] < best[name]["iterate"]:
                    best[name] = r
        best["dask"]["bitwise"] = all_equal  # every repeat, not only the fastest
        rows += [("local", method, best["local"]), (f"dask x{a.workers}", method, best["dask"])]
    if a.steps:
        with _cluster(a.workers) as (cluster, _client):
            steady = _steady(a.store, cluster.scheduler_address, out, a.methods.split(","), a.steps)
    print()
    if rows:
        print(
            "| engine | method | iterations | iterate s | s / iteration | vs local "
            "| driver peak MiB | worker peak MiB | bitwise equal |"
        )
        print("|---|---|---:|---:|---:|---:|---:|---:|---|")
    base = {m: r for n, m, r in rows if n == "local"}
    for name, method, r in rows:
        ratio = r["iterate"] / base[method]["iterate"]
        wr = f"{r['worker_rss'] / 2**20:,.0f}" if "worker_rss" in r else "-"
        eq = ("yes" if r["bitwise"] else f"no ({r['max_diff']:.1e})") if "bitwise" in r else "-"
        print(
            f"| {name} | {method} | {r['iterations']} | {r['iterate']:.1f} | {r['per_iter']:.3f} | "
            f"{ratio:.2f}x | {r['driver_rss'] / 2**20:,.0f} | {wr} | {eq} |"
        )
    if steady:
        print()
        print(f"single steps (seconds): the first, then the best and median of the next {a.steps}")
        print(
            "| method | local first | local best | local median | dask first | dask best "
            "| dask median | best vs local | same r |"
        )
        print("|---|---:|---:|---:|---:|---:|---:|---:|---|")
        print("\n".join(steady))
    print(_load())
    return 0


if __name__ == "__main__":
    sys.exit(main())
