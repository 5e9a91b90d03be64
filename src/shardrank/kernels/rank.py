"""The two kernels of a PageRank sweep: scale scores by out-weight, and gather one block.

Notation: ``r`` float64[N] scores (sum 1); ``w_out`` float64[N] out-weight (out-degree when
unweighted; 0 for a dead end); ``s`` float64[N] scaled scores ``r / w_out`` (0 at dead ends),
laid out by read slot (``store/slots.py``): the shards' sources index ``s`` by slot.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


@njit(cache=True)
def n_chunks(n_rows: int, chunk: int) -> int:
    """Number of fixed-size chunks covering ``n_rows`` rows."""
    return (n_rows + chunk - 1) // chunk


@njit(parallel=True, cache=True)
def scale_range(r, w_out, slot, lo, hi, chunk, s_out, dead_partial_out):  # pragma: no cover - jit
    """Scale ``r[lo:hi]`` by out-weight into the read slots of ``s_out``; dead-end mass per chunk.

    Parameters
    ----------
    r, w_out : float64[N]
    slot : uint[N], the read slot of each node (see ``store/slots.py``); empty: slot = id
    lo, hi : int, the index range
    chunk : int, rows per chunk
    s_out : float64[N], ``s[slot[i]] = r[i] / w_out[i]`` (0 where ``w_out == 0``) for i in lo:hi;
        a permutation, so no two rows write the same element
    dead_partial_out : float64[n_chunks(hi - lo, chunk)], sum of ``r[i]`` over dead ends per chunk
    """
    nc = (hi - lo + chunk - 1) // chunk
    by_slot = slot.shape[0] > 0
    for c in prange(nc):
        a = lo + c * chunk
        b = min(a + chunk, hi)
        acc = 0.0
        for i in range(a, b):
            k = np.int64(slot[i]) if by_slot else i
            w = w_out[i]
            if w > 0.0:
                s_out[k] = r[i] / w
            else:
                s_out[k] = 0.0
                acc += r[i]
        dead_partial_out[c] = acc


@njit(parallel=True, cache=True)
def gather_block(
    offsets, sources, weights, s, first, damping, add_uniform, add_teleport, v_block, chunk,
    r_inout, resid_partial_out,
):  # pragma: no cover - jit
    """New scores of one destination block; writes them into ``r_inout``; L1 change per chunk.

    For each row j of the block (global id ``first + j``)::

        y[j] = damping * sum_{e in row j} weights[e] * s[sources[e]]
               + add_uniform + add_teleport * v_block[j]

    (``weights`` empty: every weight is 1; ``v_block`` empty: the teleport term is folded
    into ``add_uniform``.) ``resid_partial_out[c] = sum_j |y[j] - r_inout[first + j]|`` over the
    rows of chunk c, computed before ``r_inout[first + j]`` is overwritten with ``y[j]``.

    Parameters
    ----------
    offsets : int64[n_rows + 1], block-local CSR offsets
    sources : uint16/uint32/uint64[n_edges], the sources' read slots (index into ``s``)
    weights : float64[n_edges] or float64[0]
    s : float64[N], scaled scores by read slot (only read)
    first : int, global id of row 0
    damping, add_uniform, add_teleport : float
    v_block : float64[n_rows] or float64[0], the teleport distribution on this block
    chunk : int
    r_inout : float64[N], rows ``first .. first + n_rows - 1`` are replaced
    resid_partial_out : float64[n_chunks(n_rows, chunk)]
    """
    n_rows = offsets.shape[0] - 1
    nc = (n_rows + chunk - 1) // chunk
    has_w = weights.shape[0] > 0
    has_v = v_block.shape[0] > 0
    for c in prange(nc):
        a = c * chunk
        b = min(a + chunk, n_rows)
        res = 0.0
        for j in range(a, b):
            acc = 0.0
            if has_w:
                for e in range(offsets[j], offsets[j + 1]):
                    acc += weights[e] * s[sources[e]]
            else:
                for e in range(offsets[j], offsets[j + 1]):
                    acc += s[sources[e]]
            y = damping * acc + add_uniform
            if has_v:
                y += add_teleport * v_block[j]
            g = first + j
            res += abs(y - r_inout[g])
            r_inout[g] = y
        resid_partial_out[c] = res
