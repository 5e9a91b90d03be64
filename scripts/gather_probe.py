#!/usr/bin/env python3
"""Where a PageRank step's gather time goes: the rank kernel over one store's shards, timed
(best of --repeat sweeps, 1 and 2 threads) with the shards

* ``mapped per sweep``  - memory-mapped afresh for every sweep, as the engine does (bounded RSS);
* ``mapped, kept``      - mapped once and kept (no page faults after the first sweep; the whole
                          store stays resident in the process);
* ``in RAM``            - copied into process memory once;

plus two variants of the score vector and kernel, with the shards in RAM:

* ``huge pages``        - the scaled-score vector on transparent huge pages (MADV_HUGEPAGE);
* ``fastmath``          - the kernel's row sums compiled with reassociation allowed.

usage: scripts/gather_probe.py /work/bench-data/s23v2 [--repeat 4]
"""

from __future__ import annotations

import argparse
import mmap
import os
import time
from pathlib import Path

import numba
import numpy as np
from numba import njit, prange

from shardrank.kernels import gather_block
from shardrank.store.reader import StoreReader


@njit(parallel=True, fastmath=True)
def _gather_fastmath(offsets, sources, s, first, d, chunk, r, part):  # pragma: no cover - jit
    n_rows = offsets.shape[0] - 1
    for c in prange((n_rows + chunk - 1) // chunk):
        a, b = c * chunk, min(c * chunk + chunk, n_rows)
        res = 0.0
        for j in range(a, b):
            acc = 0.0
            for e in range(offsets[j], offsets[j + 1]):
                acc += s[sources[e]]
            y = d * acc
            res += abs(y - r[first + j])
            r[first + j] = y
        part[c] = res


def _huge(n: int) -> np.ndarray:
    buf = mmap.mmap(-1, n * 8 + (2 << 20), flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    buf.madvise(mmap.MADV_HUGEPAGE)
    return np.frombuffer(buf, dtype=np.float64, count=n)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("store", type=Path)
    p.add_argument("--repeat", type=int, default=4)
    a = p.parse_args()
    st = StoreReader.open(a.store)
    n = st.n_nodes
    firsts = [b.first_node for b in st.manifest.blocks]
    in_ram = [(f, np.array(st.shard(i).offsets), np.array(st.shard(i).sources)) for i, f in enumerate(firsts)]
    kept = [(f, np.asarray(st.shard(i).offsets), np.asarray(st.shard(i).sources)) for i, f in enumerate(firsts)]

    def per_sweep():
        for i, f in enumerate(firsts):
            sh = st.shard(i)
            yield f, np.asarray(sh.offsets), np.asarray(sh.sources)

    vals = np.random.default_rng(0).uniform(0, 1e-6, n)
    s_huge = _huge(n)
    s_huge[:] = vals
    none = np.empty(0)

    def sweep(blocks, s, kernel="plain"):
        out, best = np.zeros(n), float("inf")
        for _ in range(a.repeat):
            t = time.perf_counter()
            for first, off, src in blocks():
                part = np.zeros((off.shape[0] - 1 + 4095) // 4096)
                if kernel == "plain":
                    gather_block(off, src, none, s, first, 0.85, 0.0, 0.0, none, 4096, out, part)
                else:
                    _gather_fastmath(off, src, s, first, 0.85, 4096, out, part)
            best = min(best, time.perf_counter() - t)
        return best

    print(f"{a.store}: {n:,} nodes, {st.n_edges:,} edges; load {os.getloadavg()[0]:.2f}")
    for th in (1, 2):
        numba.set_num_threads(min(th, numba.config.NUMBA_NUM_THREADS))
        rows = [
            ("mapped per sweep", sweep(per_sweep, vals)),
            ("mapped, kept", sweep(lambda: kept, vals)),
            ("in RAM", sweep(lambda: in_ram, vals)),
            ("in RAM, huge pages", sweep(lambda: in_ram, s_huge)),
            ("in RAM, fastmath", sweep(lambda: in_ram, vals, "fastmath")),
        ]
        for name, sec in rows:
            print(f"  {th} thread(s)  {name:<20} {sec:.3f} s  ({rows[0][1] / sec:.2f}x mapped per sweep)")


if __name__ == "__main__":
    main()
