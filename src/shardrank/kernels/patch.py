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


@njit(cache=True)
def renumber(
    in_old, out_old, rem_d, rem_s, touched, ins, old_to_new, pos_new, at_ins
):  # pragma: no cover - jit
    """Number the nodes after a patch in one pass over the old ids (no N-sized temporaries).

    Old node ``i`` is kept when an edge is left at it (``in_old[i] + out_old[i]`` minus its
    removed edges, ``rem_d``/``rem_s`` being the old ids of both ends of every removed edge)
    or an added edge touches it (old ids in ``touched``). New keys come in key order, the
    ``j``-th between old keys ``ins[j] - 1`` and ``ins[j]`` (``ins`` ascending).

    Fills ``pos_new[i]`` (kept old ids below ``i`` plus new keys below old key ``i``: the new
    id of a kept ``i``, monotone), ``old_to_new[i]`` (``pos_new[i]``, or -1 for a node that
    vanishes) and ``at_ins[j]`` (kept old ids below new key ``j``); returns the number of
    kept old nodes.
    """
    n = in_old.shape[0]
    for i in range(n):
        pos_new[i] = 0  # scratch first: the removed edges at each node
    for e in range(rem_d.shape[0]):
        pos_new[rem_d[e]] += 1
        pos_new[rem_s[e]] += 1
    for t in range(touched.shape[0]):
        pos_new[touched[t]] = -1  # kept whatever its degree
    kept, j, n_ins = 0, 0, ins.shape[0]
    for i in range(n):
        while j < n_ins and ins[j] <= i:
            at_ins[j] = kept
            j += 1
        c = pos_new[i]
        p = kept + j
        pos_new[i] = p
        if c < 0 or in_old[i] + out_old[i] - c > 0:
            old_to_new[i] = p
            kept += 1
        else:
            old_to_new[i] = -1
    while j < n_ins:
        at_ins[j] = kept
        j += 1
    return kept


@njit(cache=True)
def new_degrees(
    in_old, out_old, old_to_new, rem_d, rem_s, add_d, add_s, new_in, new_out
):  # pragma: no cover - jit
    """In- and out-degrees by new id: the kept old degrees, less the removed edges (old ids
    ``rem_d``/``rem_s``), plus the added ones (new ids ``add_d``/``add_s``). ``new_in`` and
    ``new_out`` come zeroed."""
    for i in range(in_old.shape[0]):
        q = old_to_new[i]
        if q >= 0:
            new_in[q] = in_old[i]
            new_out[q] = out_old[i]
    for e in range(rem_d.shape[0]):
        q = old_to_new[rem_d[e]]
        if q >= 0:
            new_in[q] -= 1
        q = old_to_new[rem_s[e]]
        if q >= 0:
            new_out[q] -= 1
    for e in range(add_d.shape[0]):
        new_in[add_d[e]] += 1
        new_out[add_s[e]] += 1


@njit(cache=True)
def slot_to_new_id(slot, old_to_new, out):  # pragma: no cover - jit
    """``out[slot[i]] = old_to_new[i]``: old read slot -> new id (-1: vanished) in one scatter,
    without the inverse permutation of the slots as an int64 temporary."""
    for i in range(slot.shape[0]):
        out[slot[i]] = old_to_new[i]


@njit(cache=True)
def find_in_rows(off, sources, local, target, base, found, where):  # pragma: no cover - jit
    """For each query ``j``: whether slot ``target[j]`` is among row ``local[j]``'s sources
    ``sources[off[r] .. off[r + 1] - 1]`` (ascending), by binary search; ``where[j]`` gets
    ``base`` plus its index (or the index it would have)."""
    for j in range(local.shape[0]):
        lo = off[local[j]]
        end = off[local[j] + 1]
        hi = end
        t = target[j]
        while lo < hi:
            mid = (lo + hi) // 2
            if sources[mid] < t:
                lo = mid + 1
            else:
                hi = mid
        found[j] = lo < end and sources[lo] == t
        where[j] = base + lo


@njit(cache=True)
def scatter_kept(old_to_new, values, out):  # pragma: no cover - jit
    """``out[old_to_new[i]] = values[i]`` for every kept old id ``i`` (``old_to_new[i] >= 0``)."""
    for i in range(old_to_new.shape[0]):
        q = old_to_new[i]
        if q >= 0:
            out[q] = values[i]
