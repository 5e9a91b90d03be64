"""numba kernels of ``shardrank patch``: the per-edge loops over the old shards.

Arrays in, arrays out; no files. ``ingest/patch.py`` says what the arrays mean.
"""

from __future__ import annotations

from numba import njit


@njit(cache=True)
def merge_rows(
    off, sources, e_base, rows_new, slot_to_new, rem_at, r, add_d, add_s, k, out_d, out_s, o
):  # pragma: no cover - jit
    """Append the new in-edges of a run of old rows to ``out_d``/``out_s`` from index ``o``.

    Old row ``i`` holds ``sources[off[i] .. off[i + 1] - 1]`` (old read slots); its edges sit
    at ``e_base + off[i] ..`` in the old store's edge numbering. Removed edges are the entries
    of the ascending ``rem_at`` from index ``r`` on; added edges are ``(add_d, add_s)`` (new
    ids, ascending by destination) from index ``k`` on. Each kept row becomes new id
    ``rows_new[i]`` (rows of vanished nodes, -1, lose every edge to the removals); added
    edges of a destination below a row's go before it, those of the row's own destination
    after its old edges.

    Returns
    -------
    (o, r, k) : the next output index, removed-edge index and added-edge index
    """
    n_add = add_d.shape[0]
    n_rem = rem_at.shape[0]
    for i in range(rows_new.shape[0]):
        q = rows_new[i]
        if q >= 0:
            while k < n_add and add_d[k] < q:
                out_d[o] = add_d[k]
                out_s[o] = add_s[k]
                o += 1
                k += 1
        for e in range(off[i], off[i + 1]):
            if r < n_rem and rem_at[r] == e_base + e:
                r += 1
                continue
            out_d[o] = q
            out_s[o] = slot_to_new[sources[e]]
            o += 1
        if q >= 0:
            while k < n_add and add_d[k] == q:
                out_d[o] = q
                out_s[o] = add_s[k]
                o += 1
                k += 1
    return o, r, k
