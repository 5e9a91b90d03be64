"""numba kernel of the store writer: turn a run of rows' source ids into sorted read slots.

Arrays in, arrays out; no files. See ``store/slots.py`` for what a read slot is.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


@njit(parallel=True, cache=True)
def relabel_rows(row_ptr, src, slot, weights, src_out, weights_out):  # pragma: no cover - jit
    """Replace every source id by its slot and sort each row by slot (weights follow).

    Parameters
    ----------
    row_ptr : int64[n_rows + 1], row r holds edges ``row_ptr[r] .. row_ptr[r + 1] - 1``
    src : uint[n_edges], source ids (any order within a row)
    slot : uint[N], the read slot of every node id
    weights : float64[n_edges] or float64[0] (unweighted)
    src_out : uint[n_edges], receives the slots, ascending within each row
    weights_out : float64[n_edges] or float64[0], receives the weights in the same order
    """
    n_rows = row_ptr.shape[0] - 1
    has_w = weights.shape[0] > 0
    for r in prange(n_rows):
        a = row_ptr[r]
        b = row_ptr[r + 1]
        if has_w:
            mapped = np.empty(b - a, dtype=np.int64)
            for e in range(a, b):
                mapped[e - a] = slot[src[e]]
            order = np.argsort(mapped)
            for k in range(b - a):
                src_out[a + k] = mapped[order[k]]
                weights_out[a + k] = weights[a + order[k]]
        else:
            # in place, no allocation per row. Insertion sort for short rows and for rows that
            # arrive nearly in slot order (a patch feeds rows in the old store's slot order, and
            # the new order differs little): its cost is the number of inversions, capped at a
            # few moves per edge, beyond which (and for a long row in random order, as a build
            # feeds rows in id order) the row is sorted whole.
            descents = 0
            for e in range(a, b):
                src_out[e] = slot[src[e]]
                if e > a and src_out[e] < src_out[e - 1]:
                    descents += 1
            if descents == 0:
                continue
            n = b - a
            if n > 32 and descents * 16 > n:
                src_out[a:b].sort()
                continue
            budget = 4 * n + 64
            for e in range(a + 1, b):
                x = src_out[e]
                k = e - 1
                while k >= a and src_out[k] > x:
                    src_out[k + 1] = src_out[k]
                    k -= 1
                    budget -= 1
                src_out[k + 1] = x
                if budget < 0:
                    src_out[a:b].sort()  # still a permutation of the row: sort it whole
                    break
