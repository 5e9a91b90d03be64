"""Structural invariants of a store, checked block by block (bounded memory)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pyarrow.parquet as pq

from ..errors import DamagedDataError
from . import layout
from .reader import _DAMAGE_HINT, StoreReader


def _fail(path: object, what: str) -> DamagedDataError:
    return DamagedDataError(f"{path}: {what}", hint=_DAMAGE_HINT)


def verify_store(
    reader: StoreReader, progress: Callable[[str, int, int], None] | None = None
) -> dict[str, int]:
    """Check every checksum, then every structural invariant. Raise DamagedDataError.

    Invariants: the read slots are a permutation of 0..N-1 (format version 2 on); offsets
    start at 0, are non-decreasing and end at the block's edge count; sources are in range and
    strictly increasing within each row (no duplicate edges);
    weights are positive and finite; the stored in/out degrees (and out-weights) equal what
    the shards imply; nodes.parquet holds ids 0..N-1 in order with unique keys.
    """
    reader.check_sizes()
    reader.verify_checksums(progress)
    m = reader.manifest
    n = m.n_nodes
    out_implied = np.zeros(n, dtype=np.int64)
    w_implied = np.zeros(n, dtype=np.float64) if m.weighted else None
    in_deg = np.asarray(reader.in_degree())
    if in_deg.shape != (n,):
        raise _fail(reader.path / layout.IN_DEGREE, f"has shape {in_deg.shape}, expected ({n},)")
    slot = reader.read_slot()
    if slot is not None:
        p_slot = reader.path / layout.READ_SLOT
        if slot.dtype.str != m.source_dtype or slot.shape != (n,):
            raise _fail(p_slot, f"dtype/shape {slot.dtype.str}{slot.shape}, expected {m.source_dtype}({n},)")
        seen = np.zeros(n, dtype=bool)
        if int(slot.max()) >= n:
            raise _fail(p_slot, f"slot {int(slot.max())} out of range (N = {n})")
        seen[slot] = True
        if not seen.all():
            raise _fail(p_slot, "is not a permutation of 0..N-1 (two nodes share a slot)")
        del seen
    for b in m.blocks:
        if progress:
            progress(f"structure of block {b.index}", b.index, len(m.blocks))
        sh = reader.shard(b.index)
        off = np.asarray(sh.offsets)
        src = np.asarray(sh.sources)
        p_off = reader.path / layout.shard_offsets(b.index)
        p_src = reader.path / layout.shard_sources(b.index)
        if off.dtype != np.int64 or off.shape != (b.n_nodes + 1,):
            raise _fail(
                p_off, f"dtype/shape {off.dtype}{off.shape}, expected int64({b.n_nodes + 1},)"
            )
        if off[0] != 0 or off[-1] != b.n_edges or np.any(np.diff(off) < 0):
            raise _fail(p_off, "offsets are not monotone from 0 to the block's edge count")
        if src.dtype.str != m.source_dtype or src.shape != (b.n_edges,):
            raise _fail(
                p_src, f"dtype/shape {src.dtype.str}{src.shape} does not match the manifest"
            )
        if b.n_edges:
            if int(src.max()) >= n:
                raise _fail(p_src, f"source {int(src.max())} out of range (N = {n})")
            # strictly increasing within a row: a drop is allowed only where a new row starts
            d = np.diff(src.astype(np.int64))
            row_start = np.zeros(b.n_edges, dtype=bool)
            starts = off[:-1][off[:-1] < b.n_edges]
            row_start[starts] = True
            if np.any((d <= 0) & ~row_start[1:]):
                raise _fail(p_src, "sources within a row are not strictly increasing")
        implied_in = np.diff(off)
        if not np.array_equal(implied_in, in_deg[b.first_node : b.first_node + b.n_nodes]):
            raise _fail(reader.path / layout.IN_DEGREE, f"differs from block {b.index}'s offsets")
        out_implied += np.bincount(src, minlength=n).astype(np.int64) if b.n_edges else 0
        if w_implied is not None:
            w = np.asarray(sh.weights)
            p_w = reader.path / layout.shard_weights(b.index)
            if w.dtype != np.float64 or w.shape != (b.n_edges,):
                raise _fail(p_w, "dtype/shape does not match the manifest")
            if b.n_edges and not (np.all(np.isfinite(w)) and np.all(w > 0)):
                raise _fail(p_w, "weights must be positive and finite")
            if b.n_edges:
                w_implied += np.bincount(src, weights=w, minlength=n)
    if slot is not None:
        # the counts above are by slot; node id i's are at slot[i]
        out_implied = out_implied[slot]
        if w_implied is not None:
            w_implied = w_implied[slot]
    out_deg = np.asarray(reader.out_degree())
    if not np.array_equal(out_deg, out_implied):
        raise _fail(
            reader.path / layout.OUT_DEGREE, "differs from the out-degrees the shards imply"
        )
    ow = np.asarray(reader.out_weight())
    expect = w_implied if w_implied is not None else out_implied.astype(np.float64)
    if (
        ow.dtype != np.float64
        or ow.shape != (n,)
        or not np.allclose(ow, expect, rtol=1e-12, atol=0)
    ):
        raise _fail(
            reader.path / layout.OUT_WEIGHT, "differs from the out-weights the shards imply"
        )
    if not np.all(np.isfinite(ow)) or np.any(ow[out_deg > 0] <= 0):
        raise _fail(
            reader.path / layout.OUT_WEIGHT,
            "out-weights must be finite, and positive for every node with out-links",
        )
    t = pq.read_table(reader.path / layout.NODES, columns=["id"])
    ids = t.column("id").to_numpy()
    if ids.shape != (n,) or not np.array_equal(ids, np.arange(n)):
        raise _fail(reader.path / layout.NODES, "ids are not 0..N-1 in order")
    return {"files": len(m.files), "blocks": len(m.blocks), "bytes": reader.bytes_on_disk()}
