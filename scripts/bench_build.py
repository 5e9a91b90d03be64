#!/usr/bin/env python3
"""Benchmark `shardrank build` against two baselines measured in the same run.

Contenders, each in its own child process (wall time and peak RSS of that process):

* ``shardrank``  - ``shardrank build EDGES --out STORE --memory M --threads T`` (integer keys
                   in a compact range take the numba counting-sort path, ingest/partition.py)
* ``shardrank-sql`` - the same command with the counting-sort path switched off, so the
                   store is built by DuckDB SQL (join, GROUP BY, ORDER BY): the path string
                   keys, weights and --nodes tables take, and the build before partition.py
* ``duckdb``     - DuckDB alone doing the same normalisation: ids for the keys in numeric
                   order, duplicates merged, edges sorted by (destination, source), written
                   as Parquet (nodes and edges), with the same memory limit, threads and spill
                   directory. No degrees, checksums or shard files: a lower bound on what a
                   SQL-only build can cost.
* ``in-memory``  - what a user without shardrank does: read every Parquet file with pyarrow,
                   map keys to ids with numpy (a presence table when the integer keys are
                   small, else np.unique), build a scipy.sparse CSR matrix (duplicates
                   summed, then set to 1). Everything in RAM; nothing written.

Targets (issue 2): shardrank faster than the in-memory route, at most 1.5x the DuckDB
baseline, and peak memory within --memory + 500 MB.

usage: scripts/bench_build.py /work/bench-data/kron23 --memory 4GB --threads 2
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_common import (
    PYTHON,
    GiB,
    Measured,
    MiB,
    dir_bytes,
    fresh_dir,
    machine_facts,  # noqa: E402
    refuse_recursion,
    run_measured,
    table,
)

SHARDRANK = str(Path(PYTHON).with_name("shardrank"))


def parse_size(s: str) -> int:
    s = s.strip().upper()
    for unit, mult in (
        ("GB", 10**9),
        ("MB", 10**6),
        ("GIB", GiB),
        ("MIB", MiB),
        ("G", GiB),
        ("M", MiB),
    ):
        if s.endswith(unit):
            return int(float(s[: -len(unit)]) * mult)
    return int(s)


# --- contenders run in child processes ------------------------------------------------------
def contender_duckdb(edges: Path, out: Path, memory: int, threads: int) -> None:
    import duckdb

    out.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect(str(out / "work.duckdb"))
    con.execute("SET enable_progress_bar = false")
    con.execute(f"SET memory_limit = '{memory // MiB}MiB'")
    con.execute(f"SET temp_directory = '{out / 'spill'}'")
    con.execute("SET preserve_insertion_order = false")
    con.execute(f"SET threads = {threads}")
    scan = f"read_parquet('{edges}/**/*.parquet')"
    con.execute(
        "CREATE TABLE keys AS SELECT key, (row_number() OVER (ORDER BY key) - 1)::BIGINT AS id "
        f"FROM (SELECT src AS key FROM {scan} UNION SELECT dst FROM {scan})"
    )
    con.execute(
        f"COPY (SELECT id, key FROM keys ORDER BY id) TO '{out / 'nodes.parquet'}' (FORMAT parquet)"
    )
    con.execute(
        f"COPY (SELECT DISTINCT b.id AS d, a.id AS s FROM {scan} e JOIN keys a ON e.src = a.key "
        "JOIN keys b ON e.dst = b.key ORDER BY d, s) "
        f"TO '{out / 'edges.parquet'}' (FORMAT parquet)"
    )
    n = con.execute(f"SELECT count(*) FROM '{out / 'edges.parquet'}'").fetchall()[0][0]
    con.close()
    print(json.dumps({"edges": int(n)}))


def contender_in_memory(edges: Path) -> None:
    import numpy as np
    import pyarrow.parquet as pq
    import scipy.sparse as sp

    t = pq.read_table(edges, columns=["src", "dst"])
    src = t.column("src").to_numpy()
    dst = t.column("dst").to_numpy()
    del t
    m = src.shape[0]
    lo = int(min(src.min(), dst.min()))
    hi = int(max(src.max(), dst.max()))
    if hi - lo < 4 * m:
        # small integer keys: a presence table and its running count give ids in key order
        present = np.zeros(hi - lo + 1, dtype=bool)
        present[src - lo] = True
        present[dst - lo] = True
        id_of = np.cumsum(present, dtype=np.int64) - 1
        n = int(id_of[-1]) + 1
        s_id, d_id = id_of[src - lo], id_of[dst - lo]
        del present, id_of
    else:
        keys, inv = np.unique(np.concatenate([src, dst]), return_inverse=True)
        s_id, d_id = inv[:m], inv[m:]
        n = keys.shape[0]
    del src, dst
    # rows = destinations (in-links), as the rank iteration gathers them; duplicates summed
    a = sp.csr_matrix((np.ones(m, dtype=np.float64), (d_id, s_id)), shape=(n, n))
    a.sum_duplicates()
    a.data[:] = 1.0
    print(json.dumps({"edges": int(a.nnz), "nodes": int(n)}))


# --- the benchmark ---------------------------------------------------------------------------
def fmt_s(x: float) -> str:
    return f"{x:.1f}"


def fmt_gib(b: int) -> str:
    return f"{b / GiB:.2f}"


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("edges", type=Path, help="a directory of Parquet edge files (src, dst)")
    p.add_argument("--memory", default="4GB", help="memory budget for shardrank and DuckDB")
    p.add_argument("--threads", type=int, default=2)
    p.add_argument(
        "--work", type=Path, default=Path("/work/bench-data/work"), help="scratch directory"
    )
    p.add_argument(
        "--only",
        action="append",
        choices=("shardrank", "shardrank-sql", "duckdb", "in-memory"),
        help="run only these contenders (repeatable)",
    )
    p.add_argument("--store", type=Path, help="keep shardrank's store here (default: scratch)")
    p.add_argument("--contender", help=argparse.SUPPRESS)
    p.add_argument("--cli-json", help=argparse.SUPPRESS)
    a = p.parse_args(argv)
    memory = parse_size(a.memory)
    refuse_recursion(a.contender is not None)
    if a.contender not in (None, "duckdb", "in-memory", "shardrank-sql"):
        p.error(f"unknown contender {a.contender!r}")
    if a.contender == "duckdb":
        contender_duckdb(a.edges, a.work, memory, a.threads)
        return 0
    if a.contender == "in-memory":
        contender_in_memory(a.edges)
        return 0
    if a.contender == "shardrank-sql":
        from shardrank.cli.main import main as cli_main
        from shardrank.ingest import build

        build.plan_integer_build = lambda *args, **kw: None  # type: ignore[assignment]
        return cli_main(json.loads(a.cli_json))

    which = a.only or ["shardrank", "shardrank-sql", "duckdb", "in-memory"]
    raw_bytes = dir_bytes(a.edges)
    print(f"input: {a.edges} ({raw_bytes / GiB:.2f} GiB of Parquet)")
    print(f"machine: {machine_facts()}")
    print(f"budget: --memory {a.memory} ({memory / GiB:.2f} GiB), --threads {a.threads}")
    results: dict[str, Measured] = {}
    store = a.store or a.work / "store"
    for name in which:
        t0 = time.strftime("%H:%M:%S")
        if name in ("shardrank", "shardrank-sql"):
            fresh_dir(a.work)
            args = [
                "build",
                str(a.edges),
                "--out",
                str(store),
                "--memory",
                a.memory,
                "--threads",
                str(a.threads),
                "--overwrite",
                "--log-format",
                "json",
            ]
            if name == "shardrank":
                cmd = [SHARDRANK, *args]
            else:
                cmd = [
                    PYTHON,
                    __file__,
                    str(a.edges),
                    "--contender",
                    "shardrank-sql",
                    "--cli-json",
                    json.dumps(args),
                ]
            m = run_measured(name, cmd).check()
            built = [json.loads(x) for x in m.stderr.splitlines() if '"built"' in x]
            extra = built[-1]["message"] if built else ""
            extra += f"; store {dir_bytes(store) / GiB:.2f} GiB on disk"
        elif name == "duckdb":
            fresh_dir(a.work / "duckdb")
            cmd = [
                PYTHON,
                __file__,
                str(a.edges),
                "--contender",
                "duckdb",
                "--work",
                str(a.work / "duckdb"),
                "--memory",
                a.memory,
                "--threads",
                str(a.threads),
            ]
            m = run_measured(name, cmd).check()
            extra = m.stdout.strip()
        else:
            cmd = [PYTHON, __file__, str(a.edges), "--contender", "in-memory"]
            m = run_measured(name, cmd, env={"OMP_NUM_THREADS": str(a.threads)}).check()
            extra = m.stdout.strip()
        results[name] = m
        print(
            f"[{t0}] {name}: {m.seconds:.1f} s, peak {m.peak_bytes / GiB:.2f} GiB  {extra}",
            flush=True,
        )
    fresh_dir(a.work / "duckdb")

    rows = []
    base_t = {k: v.seconds for k, v in results.items()}
    for name, m in results.items():
        rows.append(
            [
                name,
                fmt_s(m.seconds),
                fmt_gib(m.peak_bytes),
                f"{m.seconds / base_t['duckdb']:.2f}" if "duckdb" in base_t else "-",
                f"{m.seconds / base_t['in-memory']:.2f}" if "in-memory" in base_t else "-",
            ]
        )
    print()
    print(table(rows, ["contender", "seconds", "peak GiB", "x duckdb", "x in-memory"]))
    if "shardrank" in results:
        s = results["shardrank"]
        print()
        if "in-memory" in results:
            ok = s.seconds < results["in-memory"].seconds
            print(
                f"target build < in-memory route:   {s.seconds:.1f} s vs "
                f"{results['in-memory'].seconds:.1f} s"
                f"  {'MET' if ok else 'MISSED'}"
            )
        if "duckdb" in results:
            r = s.seconds / results["duckdb"].seconds
            print(f"target build <= 1.5x DuckDB:       {r:.2f}x  {'MET' if r <= 1.5 else 'MISSED'}")
        lim = memory + 500 * 10**6
        print(
            f"target peak <= --memory + 500 MB:  {s.peak_bytes / GiB:.2f} GiB vs "
            f"{lim / GiB:.2f} GiB"
            f"  {'MET' if s.peak_bytes <= lim else 'MISSED'}"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
