#!/usr/bin/env python3
"""Write a Graph500 Kronecker graph as a directory of Parquet edge files (int64 src, dst).

The procedure follows the Graph500 benchmark specification, section "Graph Generation"
(https://graph500.org/?page_id=12; its reference is the Octave function
``kronecker_generator(SCALE, edgefactor)``; the details below are quoted from memory of that
text): N = 2^SCALE vertices, M = edgefactor * N edges; each edge picks one quadrant of the
adjacency matrix per bit, SCALE times, with initiator probabilities A = 0.57, B = 0.19,
C = 0.19, D = 1 - (A + B + C) = 0.05; then the vertex labels are permuted at random and the
edge list is shuffled. Self-loops and duplicate edges are part of the output, as in the
specification (kernel 1 of the benchmark, here `shardrank build`, has to deal with them).

Two choices keep memory bounded (at most a few chunk-sized arrays plus the N-sized label
permutation) without changing the distribution:

* One uniform draw per bit picks the quadrant (u < A: (0,0); < A+B: (0,1); < A+B+C: (1,0);
  else (1,1)). The reference draws two uniforms (the row bit with P = C + D, then the column
  bit with P = B/(A+B) or D/(C+D) given the row bit); both give the same joint law.
* Edges are independent and identically distributed, so their order is already a uniformly
  random one; the specification's global edge shuffle is therefore skipped (it would need an
  M-sized permutation).

Every chunk draws from its own stream (numpy SeedSequence(seed).spawn), so the output depends
only on (scale, edgefactor, seed, chunk size), not on the machine.

usage: scripts/kronecker.py --scale 22 --out /work/bench-data/kron22 --seed 1
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

# Graph500 initiator (specification, "Graph Generation"); D = 1 - A - B - C = 0.05
A, B, C = 0.57, 0.19, 0.19
D = 1.0 - (A + B + C)
EDGEFACTOR = 16
CHUNK_EDGES = 1 << 22  # edges per Parquet file (4 Mi edges = 64 MiB of int64 pairs in memory)


def kronecker_chunk(rng: np.random.Generator, scale: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    """``m`` Kronecker edges (unpermuted labels 0..2^scale-1) as int64 (src, dst) arrays."""
    src = np.zeros(m, dtype=np.int64)
    dst = np.zeros(m, dtype=np.int64)
    u = np.empty(m, dtype=np.float64)
    ab, abc = A + B, A + B + C
    for bit in range(scale):
        rng.random(out=u)
        row = u >= ab  # quadrant C or D: the source bit is set (P = C + D)
        # column bit set in quadrant B (A <= u < A+B) or quadrant D (u >= A+B+C)
        col = ((u >= A) & ~row) | (u >= abc)
        src |= row.astype(np.int64) << bit
        dst |= col.astype(np.int64) << bit
    return src, dst


def write_kronecker(
    scale: int,
    out: Path,
    seed: int,
    edgefactor: int = EDGEFACTOR,
    chunk_edges: int = CHUNK_EDGES,
    quiet: bool = False,
) -> dict[str, object]:
    """Write ``edgefactor * 2^scale`` edges into ``out/part-NNNNN.parquet``; return the facts."""
    n = 1 << scale
    m = edgefactor * n
    n_chunks = (m + chunk_edges - 1) // chunk_edges
    seqs = np.random.SeedSequence(seed).spawn(n_chunks + 1)
    # vertex label permutation (specification: "the vertex numbers are randomly permuted")
    perm = np.random.Generator(np.random.PCG64(seqs[0])).permutation(n).astype(np.int64)
    out.mkdir(parents=True, exist_ok=True)
    schema = pa.schema([("src", pa.int64()), ("dst", pa.int64())])
    t0 = time.monotonic()
    for c in range(n_chunks):
        k = min(chunk_edges, m - c * chunk_edges)
        rng = np.random.Generator(np.random.PCG64(seqs[c + 1]))
        s, d = kronecker_chunk(rng, scale, k)
        table = pa.table([perm[s], perm[d]], schema=schema)
        final = out / f"part-{c:05d}.parquet"
        tmp = out / f".part-{c:05d}.parquet.partial"
        pq.write_table(table, tmp, compression="zstd", row_group_size=1 << 20)
        os.replace(tmp, final)
        if not quiet:
            el = time.monotonic() - t0
            print(
                f"\rscale {scale}: chunk {c + 1}/{n_chunks} ({el:.0f} s)",
                end="",
                file=sys.stderr,
                flush=True,
            )
    if not quiet:
        print(file=sys.stderr)
    facts = {
        "generator": "graph500-kronecker",
        "scale": scale,
        "edgefactor": edgefactor,
        "initiator": [A, B, C, round(D, 12)],
        "seed": seed,
        "chunk_edges": chunk_edges,
        "n_vertices": n,
        "n_edges_raw": m,
        "n_files": n_chunks,
        "seconds": round(time.monotonic() - t0, 1),
    }
    # "_"-prefixed: `shardrank build DIR` skips it as a non-data file
    (out / "_kronecker.json").write_text(json.dumps(facts, indent=2) + "\n")
    return facts


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--scale", type=int, required=True, help="log2 of the number of vertices")
    p.add_argument("--out", type=Path, required=True, help="directory for part-NNNNN.parquet")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--edgefactor", type=int, default=EDGEFACTOR, help="edges per vertex")
    p.add_argument("--chunk-edges", type=int, default=CHUNK_EDGES, help="edges per file")
    p.add_argument("-q", "--quiet", action="store_true")
    a = p.parse_args(argv)
    if not 1 <= a.scale <= 40:
        p.error("--scale must be between 1 and 40")
    if a.out.exists() and any(a.out.glob("part-*.parquet")):
        p.error(f"{a.out} already holds part files; remove it first")
    facts = write_kronecker(a.scale, a.out, a.seed, a.edgefactor, a.chunk_edges, a.quiet)
    print(json.dumps(facts))
    return 0


if __name__ == "__main__":
    sys.exit(main())
