"""numba kernels of the counting-sort build path (see ``ingest/partition.py``).

Arrays in, arrays out; no files. Key offsets are ``key - lo`` for the smallest key ``lo``;
an edge travels as one uint64: ``src offset << 32 | dst offset`` after the scatter, then
``dst id << 32 | src id`` after packing (so sorting orders edges by destination, then source).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


@njit(cache=True)
def scatter_batch(
    s, d, lo, span, shift, n_parts, drop_loops, present, out_pairs
):  # pragma: no cover - jit
    """Counting sort of one batch by destination key range.

    Parameters
    ----------
    s, d : int64[m], source and destination keys
    lo, span : int, keys must lie in ``lo .. lo + span - 1``
    shift : int, range ``p`` holds key offsets ``p << shift .. ((p + 1) << shift) - 1``
    n_parts : int
    drop_loops : bool, leave out edges with ``s == d`` (their keys are still nodes)
    present : uint8[span], set to 1 for every key seen
    out_pairs : uint64[m], receives ``src offset << 32 | dst offset`` grouped by range

    Returns
    -------
    int64[n_parts + 1] start of each range in ``out_pairs``, or int64[0] if a key
    lies outside the range (the caller then measures the range and starts again).
    """
    m = s.shape[0]
    starts = np.zeros(n_parts + 1, dtype=np.int64)
    for k in range(m):
        a = s[k] - lo
        b = d[k] - lo
        if a < 0 or a >= span or b < 0 or b >= span:
            return np.zeros(0, dtype=np.int64)
        present[a] = 1
        present[b] = 1
        if drop_loops and a == b:
            continue
        starts[(b >> shift) + 1] += 1
    for p in range(n_parts):
        starts[p + 1] += starts[p]
    nxt = starts[:-1].copy()
    for k in range(m):
        a = s[k] - lo
        b = d[k] - lo
        if drop_loops and a == b:
            continue
        p = b >> shift
        q = nxt[p]
        out_pairs[q] = (np.uint64(a) << np.uint64(32)) | np.uint64(b)
        nxt[p] = q + 1
    return starts


@njit(cache=True)
def number_keys(present, ids_out):  # pragma: no cover - jit
    """``ids_out[k]`` = number of present keys below ``k`` (the id of key ``k`` if present).

    Returns the number of present keys.
    """
    n = 0
    for k in range(present.shape[0]):
        ids_out[k] = n
        n += present[k]
    return n


@njit(parallel=True, cache=True)
def pack_edges(buf, ids):  # pragma: no cover - jit
    """Replace each ``src offset << 32 | dst offset`` in ``buf`` (uint64[m]) by
    ``ids[dst] << 32 | ids[src]``, in place: sorting the result orders edges by (dst, src).
    """
    for k in prange(buf.shape[0]):
        x = buf[k]
        dst_off = x & np.uint64(0xFFFFFFFF)
        src_off = x >> np.uint64(32)
        buf[k] = (np.uint64(ids[dst_off]) << np.uint64(32)) | np.uint64(ids[src_off])


@njit(cache=True)
def dedupe_sorted(keys, in_deg, out_deg, src_out):  # pragma: no cover - jit
    """Walk sorted packed edges ``dst_id << 32 | src_id``, skipping duplicates: count degrees
    and self-loops, and write the source ids of the distinct edges, in order, to ``src_out``.

    Parameters
    ----------
    keys : uint64[m], sorted
    in_deg, out_deg : int64[N], incremented
    src_out : uint32[>= m]

    Returns (number of distinct edges, number of distinct self-loops).
    """
    w = 0
    loops = 0
    prev = np.uint64(0)
    for k in range(keys.shape[0]):
        x = keys[k]
        if k > 0 and x == prev:
            continue
        prev = x
        dd = x >> np.uint64(32)
        ss = x & np.uint64(0xFFFFFFFF)
        src_out[w] = ss
        w += 1
        in_deg[dd] += 1
        out_deg[ss] += 1
        if dd == ss:
            loops += 1
    return w, loops
