#!/usr/bin/env python3
"""Benchmark `shardrank refresh`: a warm refresh after 1% edge churn vs a cold refresh of the same graph.

Steps (each refresh is a child process running the CLI, timed from outside)::

    1. snapshot B = snapshot A with a fraction (default 1%) of its edges rewired: the destination
       of each chosen edge is replaced by the destination of another edge picked at random (so
       the in-degree distribution is kept), in every part file alike (no part is unchanged)
    2. home W: refresh A                 night 1, cold (setup; reported, not compared)
    3. home W: refresh B                 night 2, warm-started from night 1   <- measured
    4. home C: refresh B                 a fresh home: cold                    <- baseline
    5. (optional, --solver) rank W's store of B cold and warm outside refresh, to separate the
       solver from the build
    6. (optional, --delta) home D, a copy of W after night 1: refresh with the change from A to
       B as a delta (--add/--remove edge tables, written outside the timing), which patches the
       published store instead of building from the whole snapshot  <- measured; its store must
       be identical (every .npy file) to W's and C's store of B

Prints iterations, seconds per phase and the ratios warm / cold; writes the same as JSON
(--json-out). Figures and commands go into docs/performance.md ("Refresh").

usage:
  scripts/bench_refresh.py --edges /work/bench-data/kron23 --work /work/bench-data/refresh-work
  scripts/bench_refresh.py --edges /tmp/k20 --work /tmp/rw --churn 0.01 --threads 2
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

CLI = "import sys; from shardrank.cli.main import main; sys.exit(main(sys.argv[1:]))"


def churn(src_dir: Path, out_dir: Path, frac: float, seed: int) -> dict[str, Any]:
    """Write snapshot B: ``frac`` of the edges of every part get another edge's destination."""
    if out_dir.exists():
        shutil.rmtree(out_dir)
    out_dir.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    changed = total = 0
    parts = sorted(p for p in src_dir.iterdir() if p.suffix == ".parquet")
    for f in parts:
        t = pq.read_table(f)
        src = t.column("src").to_numpy()
        dst = t.column("dst").to_numpy().copy()
        m = dst.size
        k = int(round(m * frac))
        idx = rng.choice(m, k, replace=False)
        dst[idx] = dst[rng.integers(0, m, k)]
        pq.write_table(pa.table({"src": src, "dst": dst}), out_dir / f.name)
        changed += int(np.count_nonzero(dst[idx] != t.column("dst").to_numpy()[idx]))
        total += m
    return {"parts": len(parts), "edges": total, "rewired": changed, "fraction": changed / total}


def write_delta(a_dir: Path, b_dir: Path, out_dir: Path) -> dict[str, int]:
    """The change from snapshot A to B as two edge tables: pairs of B's deduplicated edge set
    not in A's (added) and of A's not in B's (removed). Keys are int64 below 2^31 here, so a
    pair packs into one uint64."""
    def distinct(x: np.ndarray) -> np.ndarray:
        # sort-based (np.unique may take a hash-table path that is far slower at this size)
        x = np.sort(x)
        keep = np.ones(x.size, dtype=bool)
        keep[1:] = x[1:] != x[:-1]
        return x[keep]

    def edge_set(folder: Path) -> np.ndarray:
        parts = []
        for f in sorted(p for p in folder.iterdir() if p.suffix == ".parquet"):
            t = pq.read_table(f)
            s = t.column("src").to_numpy().astype(np.uint64)
            d = t.column("dst").to_numpy().astype(np.uint64)
            parts.append(s << np.uint64(32) | d)
        return distinct(np.concatenate(parts))

    ea, eb = edge_set(a_dir), edge_set(b_dir)
    # pairs in exactly one of the two sets: those without an equal neighbour once both are
    # sorted together (one sort; binary searches of 10^8 pairs take minutes)
    both = np.sort(np.concatenate([ea, eb]))
    lone = np.ones(both.size, dtype=bool)
    same = both[1:] == both[:-1]
    lone[1:] &= ~same
    lone[:-1] &= ~same
    once = both[lone]
    del both, lone, same, eb
    at = np.minimum(np.searchsorted(ea, once), ea.size - 1)
    in_a = ea[at] == once
    added, removed = once[~in_a], once[in_a]
    del ea
    if out_dir.exists():
        shutil.rmtree(out_dir)
    out_dir.mkdir(parents=True)
    for name, pairs in (("add", added), ("remove", removed)):
        src = (pairs >> np.uint64(32)).astype(np.int64)
        dst = (pairs & np.uint64(0xFFFFFFFF)).astype(np.int64)
        pq.write_table(pa.table({"src": src, "dst": dst}), out_dir / f"{name}.parquet")
    return {"added": int(added.size), "removed": int(removed.size)}


def store_digest(store: Path) -> dict[str, str]:
    """sha256 of every .npy file of a store (nodes.parquet bytes may differ by writer)."""
    import hashlib

    return {str(p.relative_to(store)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(store.rglob("*.npy"))}


def _children_cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def _run(cmd: list[str]) -> tuple[float, float, str, str, int]:
    """(wall seconds, CPU seconds of the child, stdout, stderr, exit code). The CPU time (the
    growth of RUSAGE_CHILDREN across one waited-for child) is steadier than wall time on a
    machine shared with other jobs."""
    c0, t0 = _children_cpu(), time.perf_counter()
    p = subprocess.run(cmd, capture_output=True, text=True)
    return time.perf_counter() - t0, _children_cpu() - c0, p.stdout, p.stderr, p.returncode


def refresh(edges: Path | None, home: Path, extra: list[str]) -> tuple[float, float, dict[str, Any]]:
    inputs = ["--edges", str(edges)] if edges is not None else []
    cmd = [sys.executable, "-c", CLI, "refresh", *inputs, "--home", str(home), "-q", *extra]
    wall, cpu, out, err, code = _run(cmd)
    if code != 0:
        raise SystemExit(f"refresh failed (exit {code}):\n{err[-3000:]}")
    return wall, cpu, json.loads(out.strip().splitlines()[-1])


def rank(store: Path, out: Path, extra: list[str]) -> tuple[float, float, dict[str, Any]]:
    if out.exists():
        shutil.rmtree(out)
    cmd = [sys.executable, "-c", CLI, "rank", str(store), "--out", str(out), "-q", *extra]
    wall, cpu, _out, err, code = _run(cmd)
    if code != 0:
        raise SystemExit(f"rank failed (exit {code}):\n{err[-3000:]}")
    return wall, cpu, json.loads((out / "run.json").read_text())


def residual_profile(store: Path, init_run: Path, sweeps: int = 3) -> list[dict[str, Any]]:
    """Where the residual |G x - x| sits at the warm start and after each Gauss-Seidel sweep.

    Adaptive PageRank (Kamvar, Haveliwala and Golub, 2003) skips the pages, or here blocks,
    that have converged; that pays when the residual concentrates on few of them. Reports the
    share of nodes, and of in-edges (the work of a sweep), holding 50/90/99% of the residual,
    and the largest and smallest share of one block against a split in proportion to block size.
    """
    from shardrank.solve.engine import LocalEngine
    from shardrank.solve.problem import Problem, Teleport
    from shardrank.solve.tables import load_init
    from shardrank.store.reader import StoreReader

    reader = StoreReader.open(store)
    n = reader.n_nodes
    tele = Teleport(n)
    eng = LocalEngine(reader, Problem(0.85, tele, "teleport"))
    ids, vals, _ = load_init(reader, str(init_run))
    x = tele.dense()
    x[ids] = vals
    x /= x.sum()
    indeg = np.asarray(reader.in_degree())
    out = []
    for step in range(sweeps + 1):
        y = x.copy()
        eng.power_step(y)
        y /= y.sum()
        res = np.abs(y - x)
        order = np.argsort(-res)
        cum = np.cumsum(res[order]) / res.sum()
        cum_e = np.cumsum(indeg[order]) / indeg.sum()
        row: dict[str, Any] = {"sweeps": step, "residual": float(res.sum())}
        for f in (0.5, 0.9, 0.99):
            k = int(np.searchsorted(cum, f)) + 1
            row[f"nodes_{f}"] = k / n
            row[f"in_edges_{f}"] = float(cum_e[k - 1])
        blocks = reader.manifest.blocks
        shares = np.array([res[b.first_node:b.first_node + b.n_nodes].sum() for b in blocks])
        even = shares.sum() * np.array([b.n_nodes for b in blocks]) / n  # in proportion to size
        row["block_share_max"], row["block_share_min"] = float((shares / even).max()), float((shares / even).min())
        out.append(row)
        eng.gauss_seidel_sweep(x)
        x /= x.sum()
    return out


def read_all(folder: Path) -> None:
    """Bring the inputs into the page cache so neither contender pays for the first read."""
    for p in sorted(folder.iterdir()):
        with open(p, "rb") as f:
            while f.read(1 << 24):
                pass


def row(name: str, w: float | int | None, c: float | int | None) -> str:
    def fmt(x: float | int | None) -> str:
        return "-" if x is None else (f"{x:,}" if isinstance(x, int) else f"{x:,.2f}")

    ratio = f"{w / c:.2f}" if w is not None and c else "-"
    return f"  {name:<22} {fmt(w):>12} {fmt(c):>12} {ratio:>8}"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--edges", type=Path, required=True, help="snapshot A: a directory of Parquet parts (src, dst)")
    ap.add_argument("--work", type=Path, required=True, help="scratch directory (snapshot B, two homes)")
    ap.add_argument("--churn", type=float, default=0.01, help="fraction of edges rewired in snapshot B")
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--threads", type=int, help="threads for build and rank (default: all cores)")
    ap.add_argument("--memory", default="6GB", help="build memory budget")
    ap.add_argument("--solver", action="store_true", help="also rank W's store of B cold and warm outside refresh")
    ap.add_argument("--repeat", type=int, default=1, help="--solver: alternate cold and warm this many times (medians)")
    ap.add_argument("--residual-profile", action="store_true",
                    help="also show where the warm start's residual sits (does adaptive skipping apply?)")
    ap.add_argument("--delta", action="store_true",
                    help="also refresh night 2 from a delta (--add/--remove) in a copy of the warm home")
    ap.add_argument("--json-out", type=Path, help="write the figures as JSON here")
    ap.add_argument("--keep-work", action="store_true", help="leave the work directory in place")
    a = ap.parse_args(argv)
    extra = ["--memory", a.memory] + (["--threads", str(a.threads)] if a.threads else [])
    a.work.mkdir(parents=True, exist_ok=True)
    snap_b = a.work / "snapshot-b"
    home_w, home_c = a.work / "home-warm", a.work / "home-cold"
    for h in (home_w, home_c):
        shutil.rmtree(h, ignore_errors=True)
    print(f"snapshot A: {a.edges}", flush=True)
    info = churn(a.edges, snap_b, a.churn, a.seed)
    print(f"snapshot B: {snap_b} ({info['rewired']:,} of {info['edges']:,} edges rewired, "
          f"{info['fraction']:.3%}, in all {info['parts']} parts)", flush=True)
    read_all(a.edges)
    t_a, c_a, s_a = refresh(a.edges, home_w, extra)
    print(f"night 1 (cold, setup): {t_a:.1f} s wall, {c_a:.1f} s CPU, {s_a['iterations']['count']} iterations", flush=True)
    home_d = a.work / "home-delta"
    if a.delta:
        shutil.rmtree(home_d, ignore_errors=True)
        shutil.copytree(home_w, home_d, symlinks=True)
        d_info = write_delta(a.edges, snap_b, a.work / "delta")
        print(f"delta A -> B: {d_info['added']:,} edges added, {d_info['removed']:,} removed "
              f"({a.work / 'delta'})", flush=True)
    read_all(snap_b)
    t_w, c_w, s_w = refresh(snap_b, home_w, extra)
    print(f"night 2 warm: {t_w:.1f} s wall, {c_w:.1f} s CPU", flush=True)
    t_c, c_c, s_c = refresh(snap_b, home_c, extra)
    print(f"night 2 cold: {t_c:.1f} s wall, {c_c:.1f} s CPU", flush=True)
    if a.delta:
        dd = a.work / "delta"
        t_d, c_d, s_d = refresh(None, home_d, [*extra, "--add", str(dd / "add.parquet"),
                                                "--remove", str(dd / "remove.parquet")])
        print(f"night 2 warm from the delta: {t_d:.1f} s wall, {c_d:.1f} s CPU", flush=True)
        same = store_digest(home_d / s_d["store"]) == store_digest(home_c / s_c["store"]) \
            == store_digest(home_w / s_w["store"])
        print(f"  stores of B identical (patched, warm full build, cold full build): {same}")
        if not same:
            raise SystemExit("the patched store differs from the full build")
    out: dict[str, Any] = {"edges": str(a.edges), "churn": info, "threads": a.threads, "memory": a.memory,
                           "night1": {"wall": t_a, "cpu": c_a, "summary": s_a},
                           "warm": {"wall": t_w, "cpu": c_w, "summary": s_w},
                           "cold": {"wall": t_c, "cpu": c_c, "summary": s_c}}
    print(f"\nrefresh of snapshot B ({s_w['nodes']:,} nodes, {s_w['edges']:,} edges)")
    print(f"  {'':<22} {'warm':>12} {'cold':>12} {'warm/cold':>8}")
    print(row("iterations", s_w["iterations"]["count"], s_c["iterations"]["count"]))
    phases = [p for p in s_c["seconds"] if p != "total"] + [p for p in s_w["seconds"] if p not in s_c["seconds"]]
    for p in phases:
        print(row(f"{p} s", s_w["seconds"].get(p), s_c["seconds"].get(p)))
    print(row("total (in process) s", s_w["seconds"]["total"], s_c["seconds"]["total"]))
    print(row("wall (process) s", t_w, t_c))
    print(row("CPU (process) s", c_w, c_c))
    if a.delta:
        out["delta"] = {"wall": t_d, "cpu": c_d, "summary": s_d}
        print("\nrefresh of snapshot B from the delta (home D) against the same cold refresh (home C)")
        print(f"  {'':<22} {'delta':>12} {'cold':>12} {'delta/cold':>8}")
        print(row("iterations", s_d["iterations"]["count"], s_c["iterations"]["count"]))
        for p in [p for p in s_d["seconds"] if p != "total"]:
            print(row(f"{p} s", s_d["seconds"].get(p), s_c["seconds"].get(p)))
        print(row("total (in process) s", s_d["seconds"]["total"], s_c["seconds"]["total"]))
        print(row("wall (process) s", t_d, t_c))
        print(row("CPU (process) s", c_d, c_c))
    print(f"  cold estimate in the warm summary: {s_w['iterations'].get('cold_estimate')} iterations; "
          f"error bounds {s_w['error_bound']:.2e} (warm), {s_c['error_bound']:.2e} (cold)")
    if a.solver:
        store = home_w / s_w["store"]
        prev = home_w / s_a["run"]
        cold_runs, warm_runs = [], []
        for _ in range(a.repeat):
            cold_runs.append(rank(store, a.work / "solver-cold", extra[2:]))
            warm_runs.append(rank(store, a.work / "solver-warm", [*extra[2:], "--init", str(prev)]))

        def med(runs: list[tuple[float, float, dict[str, Any]]], f: Any) -> float:
            return float(np.median([f(r) for r in runs]))

        print(f"\nsolver only (rank of the same store, outside refresh; median of {a.repeat})")
        print(row("iterations", warm_runs[0][2]["iterations"], cold_runs[0][2]["iterations"]))
        for name, f in (("iterate s", lambda r: r[2]["timings"]["iterate_seconds"]),
                        ("open s (incl. warm join)", lambda r: r[2]["timings"]["open_seconds"]),
                        ("wall (process) s", lambda r: r[0]), ("CPU (process) s", lambda r: r[1])):
            print(row(name, med(warm_runs, f), med(cold_runs, f)))
        out["solver"] = {
            side: [{"wall": w, "cpu": c, "iterations": d["iterations"], "timings": d["timings"]} for w, c, d in runs]
            for side, runs in (("cold", cold_runs), ("warm", warm_runs))
        }
    if a.residual_profile:
        prof = residual_profile(home_w / s_w["store"], home_w / s_a["run"])
        print("\nwhere the residual |Gx - x| sits (warm start, then after each Gauss-Seidel sweep)")
        print(f"  {'sweeps':>6} {'residual':>10} {'50%: nodes / in-edges':>24} {'90%':>16} {'99%':>16} {'block max/min vs size':>22}")
        for r in prof:
            cells = [f"{r[f'nodes_{f}']:.1%} / {r[f'in_edges_{f}']:.1%}" for f in (0.5, 0.9, 0.99)]
            print(f"  {r['sweeps']:>6} {r['residual']:>10.2e} {cells[0]:>24} {cells[1]:>16} {cells[2]:>16} "
                  f"{r['block_share_max']:>10.2f} / {r['block_share_min']:.2f}")
        out["residual_profile"] = prof
    if a.json_out:
        a.json_out.write_text(json.dumps(out, indent=2, default=str))
    if not a.keep_work:
        for p in (snap_b, home_w, home_c, home_d, a.work / "delta", a.work / "solver-cold", a.work / "solver-warm"):
            shutil.rmtree(p, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
