"""The store writer: read slots and rows cut across batches at any point.

Reference: the definition in docs/store-format.md (slots by descending out-degree, ties by id;
each row's slots ascending), computed here with plain numpy; and the same edges written in one
batch.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from shardrank.store import layout
from shardrank.store.slots import ids_by_slot, slot_order
from shardrank.store.writer import StoreWriter


def _edges(rng: np.random.Generator, n: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    # a few hubs so that some rows are long (the kernel sorts long rows differently)
    src = np.where(rng.uniform(size=m) < 0.3, rng.integers(0, 3, m), rng.integers(0, n, m))
    dst = np.where(rng.uniform(size=m) < 0.2, rng.integers(0, 2, m), rng.integers(0, n, m))
    pairs = np.unique(np.stack([dst, src], axis=1), axis=0)  # sorted by (dst, src), no duplicates
    return pairs[:, 0].astype(np.int64), pairs[:, 1].astype(np.int64)


def _write(tmp: Path, n: int, dst: np.ndarray, src: np.ndarray, w: np.ndarray | None,
           cuts: list[int]) -> dict[str, bytes]:
    tmp.mkdir()
    wr = StoreWriter(tmp, n, 7, "<u4", w is not None)
    wr.begin_shards(np.bincount(dst, minlength=n), np.bincount(src, minlength=n))
    bounds = [0, *cuts, dst.size]
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        wr.add_edges(dst[a:b], src[a:b], None if w is None else w[a:b])
    wr.finish_shards()
    assert wr.n_edges == dst.size
    return {p.relative_to(tmp).as_posix(): p.read_bytes() for p in sorted(tmp.rglob("*.npy"))}


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("seed", range(6))
def test_rows_cut_across_batches_anywhere_give_the_same_store(
    tmp_path: Path, seed: int, weighted: bool
) -> None:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(5, 60))
    dst, src = _edges(rng, n, int(rng.integers(50, 900)))
    w = rng.uniform(0.5, 2.0, dst.size) if weighted else None
    whole = _write(tmp_path / "one", n, dst, src, w, [])
    # many small batches: cuts inside rows, batches wholly inside one long row, empty batches
    cuts = sorted(set(rng.integers(0, dst.size, int(rng.integers(1, 40))).tolist()))
    assert _write(tmp_path / "many", n, dst, src, w, cuts) == whole
    # and every single cut position on its own
    for k, c in enumerate(range(0, dst.size, max(1, dst.size // 25))):
        assert _write(tmp_path / f"cut{k}", n, dst, src, w, [c]) == whole


def test_sources_are_slots_by_descending_out_degree_sorted_within_rows(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    n = 40
    dst, src = _edges(rng, n, 600)
    w = rng.uniform(0.5, 2.0, dst.size)
    files = _write(tmp_path / "s", n, dst, src, w, [100, 101, 350])
    out_deg = np.bincount(src, minlength=n)
    # the definition, written out: rank by (-out_degree, id)
    order = sorted(range(n), key=lambda i: (-out_deg[i], i))
    want_slot = np.empty(n, dtype=np.int64)
    want_slot[order] = np.arange(n)
    slot = np.load(tmp_path / "s" / layout.READ_SLOT)
    assert np.array_equal(slot, want_slot) and np.array_equal(slot, slot_order(out_deg, "<u4"))
    got_src = np.concatenate([np.load(tmp_path / "s" / layout.shard_sources(i)) for i in range(6)])
    got_w = np.concatenate([np.load(tmp_path / "s" / layout.shard_weights(i)) for i in range(6)])
    assert len(files) == 1 + 3 * 6
    row_ptr = np.concatenate([[0], np.cumsum(np.bincount(dst, minlength=n))])
    for j in range(n):
        a, b = row_ptr[j], row_ptr[j + 1]
        assert np.all(np.diff(got_src[a:b].astype(np.int64)) > 0)  # slots ascending
        # the same (source, weight) pairs as given, only reordered
        given = sorted(zip(src[a:b].tolist(), w[a:b].tolist(), strict=True))
        back = sorted(zip(ids_by_slot(slot)[got_src[a:b]].tolist(), got_w[a:b].tolist(), strict=True))
        assert given == back


@pytest.mark.parametrize("shape", ["sorted", "nearly", "far", "random", "reversed"])
def test_relabel_rows_sorts_every_row_whatever_its_order(shape: str) -> None:
    """Each branch of the kernel's row sort (already sorted, few inversions, one element far
    from its place, random, reversed) against numpy's sort of the same row."""
    from shardrank.kernels.slots import relabel_rows

    rng = np.random.default_rng(len(shape))
    lengths = [0, 1, 2, 5, 31, 33, 200, 5000]
    row_ptr = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    n = 20000
    slot = np.arange(n, dtype=np.uint32)  # identity slots: the row order is the input order
    rows = []
    for k in lengths:
        x = rng.choice(n, k, replace=False)
        x.sort()
        if shape == "nearly" and k > 1:
            i = rng.integers(0, k - 1, max(1, k // 50))
            x[i], x[i + 1] = x[i + 1], x[i].copy()
        elif shape == "far" and k > 1:
            x = np.concatenate([x[1:], x[:1]])  # the smallest at the end
        elif shape == "random":
            rng.shuffle(x)
        elif shape == "reversed":
            x = x[::-1]
        rows.append(x)
    src = np.concatenate(rows).astype(np.uint32)
    out = np.empty_like(src)
    relabel_rows(row_ptr, src, slot, np.empty(0), out, np.empty(0))
    for j in range(len(lengths)):
        a, b = row_ptr[j], row_ptr[j + 1]
        assert np.array_equal(out[a:b], np.sort(src[a:b])), (shape, lengths[j])
