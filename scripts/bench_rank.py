#!/usr/bin/env python3
"""Benchmark `shardrank rank` against a scipy.sparse CSR power iteration on the same store.

Every contender runs in its own child process (numba's thread count is per process, and each
child's peak RSS is its own):

* ``shardrank power|gauss-seidel, T threads`` - ``shardrank.rank(STORE, ...)`` (the code
  behind `shardrank rank`) to --tol; a reporter records the time of every iteration, so the
  median seconds per iteration is per step kind (power steps, Gauss-Seidel sweeps).
* ``scipy``  - the same PageRank definition (dead ends to teleport, uniform teleport, the same
  stopping rule ``d/(1-d) * ||G x - x||_1 <= tol``) as a scipy.sparse CSR matrix-vector power
  iteration, the matrix loaded from the same store (int32 indices, float64 data), written as a
  user would (``y = A @ x``: new arrays every step).
* ``scipy prealloc`` - the same with every N-sized buffer allocated once and scipy's own CSR
  kernel accumulating into it: on machines where fresh memory is slow to touch (this VM), the
  temporaries of the plain version cost more than the matrix-vector product itself.
* ``scipy prealloc, slot order`` - the same with the matrix's columns in the store's read-slot
  order (``store/slots.py``) and the scaled scores scattered into slots every step: how much of
  shardrank's lead is the node order, which any CSR kernel could use, and how much the kernel.
  The target ratio is taken against the faster of the two id-order scipy runs (the matrix a
  user builds from the edge table); the ratio to this one is printed beside it.
* ``memcap`` (``--memcap SIZE``) - `shardrank rank` under ../shared/tools/memcap with a cap
  below the store's size on disk: it must finish; its wall time is compared with the
  uncapped run.

Targets (issue 3): median seconds per iteration <= 0.3x scipy's; Gauss-Seidel reaches --tol
in <= 0.6x the power method's iterations; rank peak memory <= 3 x 8N bytes + 300 MB, flat in
the edge count.

usage: scripts/bench_rank.py /work/bench-data/s22 /work/bench-data/s23 --memcap 300M
       scripts/bench_rank.py STORE --sweep-chunks 1024,4096,16384   (Gauss-Seidel chunk sizes)
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_common import (
    PYTHON,
    REPO,
    GiB,
    Measured,
    MiB,
    dir_bytes,
    machine_facts,  # noqa: E402
    refuse_recursion,
    run_measured,
    table,
)

MEMCAP = REPO.parent / "shared" / "tools" / "memcap"
SHARDRANK = str(Path(PYTHON).with_name("shardrank"))


# --- children -------------------------------------------------------------------------------
def child_shardrank(
    store: Path,
    run: Path,
    method: str,
    threads: int,
    tol: float,
    row_chunk: int | None,
    max_iter: int,
) -> None:
    import shardrank
    from shardrank import settings
    from shardrank.progress import Reporter
    from shardrank.solve.options import RankOptions

    if row_chunk:
        settings.ROW_CHUNK = row_chunk  # the engine reads it when it starts

    class Clock(Reporter):
        def __init__(self) -> None:
            self.stamps: list[tuple[float, float]] = []
            self.start = (0.0, 0.0)

        def event(self, kind: str, message: str, **fields: object) -> None:
            if message.startswith("ranking "):
                self.start = (time.perf_counter(), time.process_time())

        def progress(
            self, phase: str, done: float, total: float | None, unit: str = "", **fields: object
        ) -> None:
            if phase == "ranking":
                self.stamps.append((time.perf_counter(), time.process_time()))

    clock = Clock()
    shutil.rmtree(run, ignore_errors=True)
    o = RankOptions(
        method=method, threads=threads, tol=tol, max_iter=max_iter, checkpoint_seconds=1e9
    )
    t0 = time.perf_counter()
    res = shardrank.rank(store, run, o, clock)
    wall = time.perf_counter() - t0
    doc = json.loads((run / "run.json").read_text())
    steps = doc["history"]["step"]
    pairs = list(zip([clock.start, *clock.stamps[:-1]], clock.stamps, strict=True))
    by_kind: dict[str, list[float]] = {}
    cpu_kind: dict[str, list[float]] = {}
    for kind, (a, b) in zip(steps, pairs, strict=True):
        by_kind.setdefault(kind, []).append(b[0] - a[0])
        cpu_kind.setdefault(kind, []).append(b[1] - a[1])
    resid = doc["history"]["residual"]
    gs = [x for x, k in zip(resid, steps, strict=True) if k == "gauss-seidel"]
    seq = gs if len(gs) >= 3 else resid
    # geometric mean of the change's ratio from one step to the next (the convergence rate)
    rate = (
        (seq[-1] / seq[1]) ** (1 / (len(seq) - 2)) if len(seq) >= 3 and seq[1] > 0 else float("nan")
    )
    print(
        json.dumps(
            {
                "iterations": doc["iterations"],
                "converged": doc["converged"],
                "error_bound": doc["error_bound"],
                "wall": wall,
                "iterate_seconds": doc["timings"]["iterate_seconds"],
                "median": {k: statistics.median(v) for k, v in by_kind.items()},
                "median_cpu": {k: statistics.median(v) for k, v in cpu_kind.items()},
                "steps": {k: len(v) for k, v in by_kind.items()},
                "rate": rate,
                "residuals": resid,
                "n_nodes": doc["n_nodes"],
                "n_edges": doc["n_edges"],
                "threads": doc.get("threads"),
                "scores_sha256": doc["scores"]["sha256"],
                "converged_flag": bool(res.converged),
            }
        )
    )


def child_scipy(
    store: Path, tol: float, damping: float, max_iter: int, prealloc: bool, compare: Path | None,
    slot_order: bool = False,
) -> None:
    import numpy as np
    import scipy.sparse as sp
    from scipy.sparse._sparsetools import csr_matvec  # y += A x into a given y (scipy's own kernel)

    from shardrank.store.reader import StoreReader
    from shardrank.store.slots import ids_by_slot

    reader = StoreReader.open(store)
    n = reader.n_nodes
    indptr = np.zeros(n + 1, dtype=np.int64)
    indices = np.empty(reader.n_edges, dtype=np.int32)
    pos = 0
    for i, b in enumerate(reader.manifest.blocks):
        sh = reader.shard(i)
        indptr[b.first_node + 1 : b.first_node + b.n_nodes + 1] = np.asarray(sh.offsets[1:]) + pos
        indices[pos : pos + b.n_edges] = sh.sources
        pos += b.n_edges
    # rows = destinations, as in the store; data = 1 (unweighted) so A @ (r / outdeg) gathers
    a = sp.csr_matrix((np.ones(reader.n_edges), indices, indptr), shape=(n, n))
    slot = reader.read_slot()
    if slot is not None:
        slot = np.array(slot, dtype=np.int64)
    if slot is not None and not slot_order:
        # the shards hold read slots: back to node ids, each row sorted by id, i.e. the matrix
        # a user builds from the edge table
        a.indices = ids_by_slot(slot)[a.indices].astype(np.int32)
        a.has_sorted_indices = False
        a.sort_indices()
    elif slot is None:
        slot_order = False
    w = np.array(reader.out_weight())
    dead = w == 0
    inv = np.zeros(n)
    np.divide(1.0, w, out=inv, where=~dead)
    r = np.full(n, 1.0 / n)
    gain = damping / (1 - damping)
    times: list[float] = []
    t_start = time.perf_counter()
    bound = float("inf")
    k = 0
    x, y, tmp = np.empty(n), np.empty(n), np.empty(n)
    for k in range(1, max_iter + 1):  # noqa: B007 (k is reported after the loop)
        t = time.perf_counter()
        if prealloc:
            # the same step without temporaries: every N-sized buffer is allocated once
            if slot_order:
                np.multiply(r, inv, out=tmp)
                x[slot] = tmp  # scaled scores by read slot, as shardrank lays them out
            else:
                np.multiply(r, inv, out=x)
            dead_mass = float(np.sum(r, where=dead))
            y.fill(0.0)
            csr_matvec(n, n, a.indptr, a.indices, a.data, x, y)
            y *= damping
            y += (damping * dead_mass + 1 - damping) / n
            np.subtract(y, r, out=tmp)
            change = float(np.abs(tmp, out=tmp).sum())
            y /= y.sum()
            r, y = y, r
        else:
            # what a user writes: every operation returns a new array
            x = r * inv
            dead_mass = float(r[dead].sum())
            y = a @ x
            y *= damping
            y += (damping * dead_mass + 1 - damping) / n
            change = float(np.abs(y - r).sum())
            y /= y.sum()
            r = y
        times.append(time.perf_counter() - t)
        bound = gain * change
        if bound <= tol:
            break
    # sanity: both answers are within tol of the exact one, so within 2 tol of each other
    l1 = float(np.abs(r - np.load(compare, allow_pickle=False)).sum()) if compare else None
    print(
        json.dumps(
            {
                "iterations": k,
                "converged": bound <= tol,
                "error_bound": bound,
                "l1_to_shardrank": l1,
                "wall": time.perf_counter() - t_start,
                "median": {"power": statistics.median(times)},
                "n_nodes": n,
                "n_edges": reader.n_edges,
            }
        )
    )


# --- driver ---------------------------------------------------------------------------------
def _child(
    args: list[str], env: dict[str, str] | None = None, name: str = ""
) -> tuple[Measured, dict]:
    m = run_measured(name, [PYTHON, __file__, *args], env=env).check()
    return m, json.loads(m.stdout.strip().splitlines()[-1])


def _rank_child(
    store: Path,
    work: Path,
    method: str,
    threads: int,
    tol: float,
    max_iter: int,
    row_chunk: int | None = None,
) -> tuple[Measured, dict]:
    args = [
        "--child",
        "shardrank",
        str(store),
        "--run",
        str(work / "run"),
        "--method",
        method,
        "--threads",
        str(threads),
        "--tol",
        str(tol),
        "--max-iter",
        str(max_iter),
    ]
    if row_chunk:
        args += ["--row-chunk", str(row_chunk)]
    # NUMBA_NUM_THREADS caps the pool, so a 1-thread run has no idle workers either
    return _child(args, env={"NUMBA_NUM_THREADS": str(threads)}, name=f"{method}/{threads}")


def bench_store(store: Path, a: argparse.Namespace) -> dict[str, object]:
    print(f"\n== {store} ==", flush=True)
    res: dict[str, tuple[Measured, dict]] = {}
    for method in ("power", "gauss-seidel"):
        for threads in a.threads:
            key = f"shardrank {method} {threads}t"
            res[key] = _rank_child(store, a.work, method, threads, a.tol, a.max_iter)
            m, d = res[key]
            print(
                f"[{time.strftime('%H:%M:%S')}] {key}: {d['iterations']} it, {d['wall']:.1f} s, "
                f"median {d['median']}, peak {m.peak_bytes / MiB:.0f} MiB  "
                f"(load {os.getloadavg()[0]:.2f})",
                flush=True,
            )
    for name, extra in (
        ("scipy", []),
        ("scipy prealloc", ["--prealloc"]),
        ("scipy prealloc, slot order", ["--prealloc", "--slot-order"]),
    ):
        res[name] = _child(
            [
                "--child",
                "scipy",
                str(store),
                "--tol",
                str(a.tol),
                "--max-iter",
                str(a.max_iter),
                "--compare",
                str(a.work / "run" / "scores.npy"),
                *extra,
            ],
            env={"OMP_NUM_THREADS": "1"},
            name=name,
        )
        m, d = res[name]
        print(
            f"[{time.strftime('%H:%M:%S')}] {name}: {d['iterations']} it, {d['wall']:.1f} s, "
            f"median {d['median']}, peak {m.peak_bytes / MiB:.0f} MiB, "
            f"L1 distance to shardrank's scores {d['l1_to_shardrank']:.2e}",
            flush=True,
        )
    n_nodes, n_edges = d["n_nodes"], d["n_edges"]
    # the ratio is taken against the faster scipy variant (the stricter comparison)
    sp_it = min(res[k][1]["median"]["power"] for k in ("scipy", "scipy prealloc"))
    rows = []
    for key, (m, d) in res.items():
        med = d["median"].get("power", float("nan"))
        sweep = d["median"].get("gauss-seidel")
        rows.append(
            [
                key,
                str(d["iterations"]),
                f"{d['wall']:.1f}",
                f"{med:.3f}",
                f"{sweep:.3f}" if sweep else "-",
                f"{n_edges / (sweep or med) / 1e6:.0f}",
                f"{(sweep or med) / sp_it:.2f}",
                f"{m.peak_bytes / MiB:.0f}",
            ]
        )
    print()
    print(
        f"{n_nodes:,} nodes, {n_edges:,} edges, {dir_bytes(store) / GiB:.2f} GiB on disk; "
        f"tol {a.tol:g}"
    )
    print(
        table(
            rows,
            [
                "contender",
                "iters",
                "wall s",
                "s/power step",
                "s/GS sweep",
                "Medge/s",
                "x scipy",
                "peak MiB",
            ],
        )
    )
    top = max(a.threads)
    p_it = res[f"shardrank power {top}t"][1]["iterations"]
    g_it = res[f"shardrank gauss-seidel {top}t"][1]["iterations"]
    ratio = res[f"shardrank power {top}t"][1]["median"]["power"] / sp_it
    limit = 24 * n_nodes + 300 * 10**6
    peak = max(m.peak_bytes for k, (m, _d) in res.items() if k.startswith("shardrank"))
    same = {d["scores_sha256"] for k, (_m, d) in res.items() if k.startswith("shardrank power")}
    print()
    print(
        f"target s/iteration <= 0.3x the faster scipy ({top} threads, power): {ratio:.2f}x  "
        f"{'MET' if ratio <= 0.3 else 'MISSED'}"
    )
    slot_it = res["scipy prealloc, slot order"][1]["median"]["power"]
    print(
        f"  (against scipy with the matrix in read-slot order, {slot_it:.3f} s/step: "
        f"{ratio * sp_it / slot_it:.2f}x; 1 thread: "
        f"{res[f'shardrank power {min(a.threads)}t'][1]['median']['power'] / slot_it:.2f}x)"
    )
    print(
        f"target GS iterations <= 0.6x power: {g_it}/{p_it} = {g_it / p_it:.2f}  "
        f"{'MET' if g_it <= 0.6 * p_it else 'MISSED'}"
    )
    print(
        f"target peak <= 24 N + 300 MB = {limit / MiB:.0f} MiB: {peak / MiB:.0f} MiB  "
        f"{'MET' if peak <= limit else 'MISSED'}"
    )
    print(f"power scores identical at {a.threads} threads: {len(same) == 1}")
    out: dict[str, object] = {"n_nodes": n_nodes, "n_edges": n_edges, "peak": peak, "limit": limit}
    if a.memcap:
        memcap_runs(store, a, top)
    return out


def evict(store: Path) -> None:
    """Drop the store's files from the page cache (POSIX_FADV_DONTNEED; clean pages only).

    A memory cgroup is charged for the page cache its processes bring in, not for pages that
    are already cached, so a capped run on a warm store would not feel its cap."""
    for p in store.rglob("*"):
        if p.is_file():
            fd = os.open(p, os.O_RDONLY)
            try:
                os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
            finally:
                os.close(fd)


def memcap_runs(store: Path, a: argparse.Namespace, threads: int) -> None:
    """`shardrank rank` (CLI) warm, cold (store evicted from the page cache), cold under memcap."""
    rows = []
    base = [
        SHARDRANK,
        "rank",
        str(store),
        "--out",
        str(a.work / "capped"),
        "--method",
        "power",
        "--threads",
        str(threads),
        "--tol",
        str(a.tol),
        "--overwrite",
        "-q",
    ]
    for name, cold, cap in (
        ("warm", False, None),
        ("cold", True, None),
        (f"cold, memcap {a.memcap}", True, a.memcap),
    ):
        if cold:
            evict(store)
        cmd = [str(MEMCAP), cap, *base] if cap else base
        m = run_measured(name, cmd)
        line = [x for x in m.stderr.splitlines() if x.startswith("memcap:")]
        rows.append(
            [
                name,
                str(m.returncode),
                f"{m.seconds:.1f}",
                f"{m.peak_bytes / MiB:.0f}",
                line[-1] if line else "",
            ]
        )
        shutil.rmtree(a.work / "capped", ignore_errors=True)
    print(
        f"\nrank under a memory cap (store {dir_bytes(store) / MiB:.0f} MiB on disk; CLI, power, "
        f"{threads} threads)"
    )
    print(table(rows, ["run", "exit", "seconds", "peak RSS MiB", "memcap"]))
    warm, cold, capped = (float(r[2]) for r in rows)
    print(
        f"capped run: {capped / warm:.2f}x the warm run, {capped / cold:.2f}x the cold uncapped run"
    )


def sweep_chunks(store: Path, a: argparse.Namespace) -> None:
    print(f"\n== Gauss-Seidel row chunk sweep on {store} ==", flush=True)
    rows = []
    for chunk in a.sweep_chunks:
        for method in (
            ("power", "gauss-seidel") if chunk == a.sweep_chunks[0] else ("gauss-seidel",)
        ):
            m, d = _rank_child(
                store, a.work, method, max(a.threads), a.tol, a.max_iter, row_chunk=chunk
            )
            med = d["median"]
            cpu = d["median_cpu"]
            rows.append(
                [
                    method,
                    str(chunk),
                    str(d["iterations"]),
                    f"{d['rate']:.4f}",
                    f"{d['wall']:.1f}",
                    f"{med.get('gauss-seidel', med.get('power')):.3f}",
                    f"{cpu.get('gauss-seidel', cpu.get('power')):.3f}",
                ]
            )
            print(f"  {rows[-1]}", flush=True)
    print(
        table(rows, ["method", "row chunk", "iters", "rate/step", "wall s", "s/step", "cpu s/step"])
    )


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("stores", nargs="+", type=Path)
    p.add_argument("--threads", type=lambda s: [int(x) for x in s.split(",")], default=[1, 2])
    p.add_argument("--tol", type=float, default=1e-9)
    p.add_argument("--max-iter", type=int, default=1000)
    p.add_argument("--work", type=Path, default=Path("/work/bench-data/rank-work"))
    p.add_argument(
        "--memcap", metavar="SIZE", help="also rank under memcap with this cap (e.g. 300M)"
    )
    p.add_argument(
        "--sweep-chunks",
        type=lambda s: [int(x) for x in s.split(",")],
        help="instead: Gauss-Seidel iterations and time for these ROW_CHUNK values",
    )
    p.add_argument("--child", choices=("shardrank", "scipy"), help=argparse.SUPPRESS)
    p.add_argument("--run", type=Path, help=argparse.SUPPRESS)
    p.add_argument("--method", default="power", help=argparse.SUPPRESS)
    p.add_argument("--row-chunk", type=int, help=argparse.SUPPRESS)
    p.add_argument("--prealloc", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--slot-order", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--compare", type=Path, help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    refuse_recursion(a.child is not None)
    if a.child == "shardrank":
        child_shardrank(a.stores[0], a.run, a.method, a.threads[0], a.tol, a.row_chunk, a.max_iter)
        return 0
    if a.child == "scipy":
        child_scipy(a.stores[0], a.tol, 0.85, a.max_iter, a.prealloc, a.compare, a.slot_order)
        return 0
    a.work.mkdir(parents=True, exist_ok=True)
    print(f"machine: {machine_facts()}")
    for store in a.stores:
        if a.sweep_chunks:
            sweep_chunks(store, a)
        else:
            bench_store(store, a)
    shutil.rmtree(a.work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
