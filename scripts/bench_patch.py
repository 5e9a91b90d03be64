#!/usr/bin/env python3
"""Benchmark `shardrank patch` (old store + 1 % delta) against a full `shardrank build` of the
resulting edge set, measured in the same run, and check that both stores are identical.

Preparation (not timed): from STORE (default /work/bench-data/s23v2, the scale-23 Kronecker
store) remove about 1 % of the edges, chosen at random with --seed, and add as many new
random edges between existing nodes. Written as Parquet in WORK: ``remove.parquet``,
``add.parquet``, and the whole new edge set as ``new/part-*.parquet`` (one file per store block
plus the added edges; the build merges the duplicates an added edge may make).

Contenders, each in its own child process (wall time and peak RSS of that process):

* ``patch`` - ``shardrank patch STORE --add add.parquet --remove remove.parquet --out P``
* ``build`` - ``shardrank build WORK/new --out F`` (the baseline: what a refresh does today)

Then every .npy file of P and F is compared by sha256, and their node keys by value.

usage: scripts/bench_patch.py [--store /work/bench-data/s23v2] [--work /work/bench-data/work/patch]
"""

from __future__ import annotations

import argparse
import hashlib
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_common import (  # noqa: E402
    PYTHON,
    GiB,
    fresh_dir,
    load_average,
    machine_facts,
    refuse_recursion,
    run_measured,
    table,
)

SHARDRANK = str(Path(PYTHON).with_name("shardrank"))


def prepare(store: Path, work: Path, fraction: float, seed: int) -> dict[str, int]:
    """Write remove.parquet, add.parquet and new/part-*.parquet; return their sizes."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    import shardrank
    from shardrank.store.slots import ids_by_slot

    rng = np.random.default_rng(seed)
    r = shardrank.open_store(store)
    keys = np.asarray(r.keys().to_numpy(), dtype=np.int64)
    id_of_slot = ids_by_slot(np.asarray(r.read_slot()))
    new = fresh_dir(work / "new")
    removed_s, removed_d = [], []
    n_kept = 0
    for b in range(r.n_blocks):
        sh = r.shard(b)
        off = np.asarray(sh.offsets)
        dst = np.repeat(
            np.arange(sh.info.first_node, sh.info.first_node + sh.info.n_nodes), np.diff(off)
        )
        src = id_of_slot[np.asarray(sh.sources)]
        gone = rng.random(src.shape[0]) < fraction
        removed_s.append(keys[src[gone]])
        removed_d.append(keys[dst[gone]])
        t = pa.table({"src": keys[src[~gone]], "dst": keys[dst[~gone]]})
        pq.write_table(t, new / f"part-{b:05d}.parquet")
        n_kept += t.num_rows
    rs, rd = np.concatenate(removed_s), np.concatenate(removed_d)
    pq.write_table(pa.table({"src": rs, "dst": rd}), work / "remove.parquet")
    n_add = rs.shape[0]
    add = pa.table(
        {
            "src": keys[rng.integers(0, keys.shape[0], n_add)],
            "dst": keys[rng.integers(0, keys.shape[0], n_add)],
        }
    )
    pq.write_table(add, work / "add.parquet")
    pq.write_table(add, new / "part-added.parquet")
    return {"edges": r.n_edges, "removed": int(rs.shape[0]), "added": n_add, "kept": n_kept}


def npy_digests(store: Path) -> dict[str, str]:
    return {
        str(p.relative_to(store)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(store.rglob("*.npy"))
    }


def main() -> None:
    refuse_recursion(False)
    ap = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    ap.add_argument("--store", type=Path, default=Path("/work/bench-data/s23v2"))
    ap.add_argument("--work", type=Path, default=Path("/work/bench-data/work/patch"))
    ap.add_argument(
        "--fraction",
        type=float,
        default=0.01,
        help="share of the edges removed (and as many added)",
    )
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--threads", type=int, default=2)
    a = ap.parse_args()
    a.work.mkdir(parents=True, exist_ok=True)
    print(machine_facts())
    print(f"load average before: {load_average()}")
    facts = prepare(a.store, a.work, a.fraction, a.seed)
    print(
        f"delta: {facts['removed']:,} edges removed and {facts['added']:,} added "
        f"of {facts['edges']:,} (seed {a.seed})"
    )
    p_out, f_out = a.work / "patched.store", a.work / "full.store"
    runs = []
    patch_cmd = [
        SHARDRANK,
        "patch",
        str(a.store),
        "--add",
        str(a.work / "add.parquet"),
        "--remove",
        str(a.work / "remove.parquet"),
        "--out",
        str(p_out),
        "--overwrite",
        "--threads",
        str(a.threads),
        "-q",
    ]
    runs.append(run_measured("patch", patch_cmd).check())
    print(f"load average between: {load_average()}")
    build_cmd = [
        SHARDRANK,
        "build",
        str(a.work / "new"),
        "--out",
        str(f_out),
        "--overwrite",
        "--threads",
        str(a.threads),
        "-q",
    ]
    runs.append(run_measured("build", build_cmd).check())
    print(f"load average after: {load_average()}")
    dp, df = npy_digests(p_out), npy_digests(f_out)
    same_npy = dp == df
    import shardrank

    same_keys = shardrank.open_store(p_out).keys().equals(shardrank.open_store(f_out).keys())
    m = shardrank.open_store(p_out).manifest
    print(
        table(
            [[r.name, f"{r.seconds:.1f}", f"{r.peak_bytes / GiB:.2f}"] for r in runs],
            ["contender", "wall s", "peak RSS GiB"],
        )
    )
    print(
        f"patch / build: wall {runs[0].seconds / runs[1].seconds:.3f}, "
        f"peak RSS {runs[0].peak_bytes / runs[1].peak_bytes:.3f}"
    )
    c = m.counts
    print(
        f"patched store: {m.n_nodes:,} nodes, {m.n_edges:,} edges; "
        f"edges_added {c['edges_added']:,}, "
        f"edges_removed {c['edges_removed']:,}, additions_present {c['additions_present']:,}, "
        f"nodes_added {c['nodes_added']:,}, nodes_vanished {c['nodes_vanished']:,}"
    )
    print(
        f"identical: {len(dp)} .npy files {'all equal' if same_npy else 'DIFFER'} by sha256; "
        f"node keys {'equal' if same_keys else 'DIFFER'}"
    )
    if not (same_npy and same_keys):
        bad = sorted(k for k in set(dp) | set(df) if dp.get(k) != df.get(k))
        raise SystemExit(f"stores differ: {bad[:10]}")


if __name__ == "__main__":
    main()
