"""The counting-sort kernels against slow, obviously correct Python versions of their docstrings."""

from __future__ import annotations

import numpy as np
import pytest

from shardrank.kernels.partition import dedupe_sorted, number_keys, pack_edges, scatter_batch


@pytest.mark.parametrize("drop_loops", [False, True])
def test_scatter_batch_groups_edges_by_destination_range(drop_loops: bool) -> None:
    rng = np.random.default_rng(3)
    lo, span, shift = -40, 200, 5
    n_parts = ((span - 1) >> shift) + 1
    s = rng.integers(lo, lo + span, 500)
    d = rng.integers(lo, lo + span, 500)
    d[:20] = s[:20]  # some self-loops
    present = np.zeros(span, dtype=np.uint8)
    out = np.zeros(500, dtype=np.uint64)
    starts = scatter_batch(s, d, lo, span, shift, n_parts, drop_loops, present, out)
    # naive: every key seen is present; range p holds the kept edges with (d - lo) >> shift == p
    assert set(np.flatnonzero(present)) == set((s - lo).tolist()) | set((d - lo).tolist())
    kept = [(a - lo, b - lo) for a, b in zip(s, d, strict=True) if not (drop_loops and a == b)]
    assert starts[-1] == len(kept)
    for p in range(n_parts):
        got = sorted(int(x) for x in out[starts[p] : starts[p + 1]])
        want = sorted((a << 32) | b for a, b in kept if b >> shift == p)
        assert got == want


def test_scatter_batch_reports_a_key_out_of_range() -> None:
    present = np.zeros(10, dtype=np.uint8)
    out = np.zeros(2, dtype=np.uint64)
    s, d = np.array([0, 3]), np.array([10, 2])  # 10 is outside 0..9
    assert scatter_batch(s, d, 0, 10, 2, 3, False, present, out).shape[0] == 0


def test_number_keys_counts_present_keys_below() -> None:
    present = np.array([0, 1, 1, 0, 0, 1, 0], dtype=np.uint8)
    ids = np.zeros(7, dtype=np.uint32)
    assert number_keys(present, ids) == 3
    assert ids[[1, 2, 5]].tolist() == [0, 1, 2]  # the ids of the present keys, in key order


def test_pack_then_dedupe() -> None:
    rng = np.random.default_rng(5)
    ids = rng.permutation(50).astype(np.uint32)
    src_off, dst_off = rng.integers(0, 50, 300), rng.integers(0, 50, 300)
    buf = (src_off.astype(np.uint64) << np.uint64(32)) | dst_off.astype(np.uint64)
    pack_edges(buf, ids)
    # (dst id, src id) of every edge
    pairs = [(int(ids[b]), int(ids[a])) for a, b in zip(src_off, dst_off, strict=True)]
    assert sorted(int(x) for x in buf) == sorted((d << 32) | s for d, s in pairs)
    buf.sort()
    in_deg, out_deg = np.zeros(50, dtype=np.int64), np.zeros(50, dtype=np.int64)
    src = np.zeros(300, dtype=np.uint32)
    n, loops = dedupe_sorted(buf, in_deg, out_deg, src)
    distinct = sorted(set(pairs))
    assert n == len(distinct) and loops == sum(d == s for d, s in distinct)
    assert src[:n].tolist() == [s for _d, s in distinct]
    assert in_deg.tolist() == [sum(d == v for d, _s in distinct) for v in range(50)]
    assert out_deg.tolist() == [sum(s == v for _d, s in distinct) for v in range(50)]
