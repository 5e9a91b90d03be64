"""Shared fixtures: tiny edge tables written as real Parquet/CSV files, and stores built from them."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions
from shardrank.store.slots import ids_by_slot


def write_edges(path: Path, src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None,
                names: tuple[str, str, str] = ("src", "dst", "w")) -> Path:
    """Write an edge table; the format follows the suffix (.parquet, .csv, .tsv)."""
    cols: dict[str, Any] = {names[0]: list(src), names[1]: list(dst)}
    if weight is not None:
        cols[names[2]] = list(weight)
    t = pa.table(cols)
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.suffix == ".parquet":
        pq.write_table(t, path)
    else:
        sep = "\t" if path.suffix == ".tsv" else ","
        lines = [sep.join(cols)] + [sep.join(str(c[i]) for c in cols.values()) for i in range(len(src))]
        path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture
def edges_file(tmp_path: Path) -> Callable[..., Path]:
    def make(src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None,
             name: str = "edges.parquet", **kw: Any) -> Path:
        return write_edges(tmp_path / name, src, dst, weight, **kw)

    return make


@pytest.fixture
def build(tmp_path: Path) -> Callable[..., Path]:
    """build(src, dst, weight=None, **BuildOptions) -> store path."""
    counter = iter(range(10**6))

    def make(src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None, **opts: Any) -> Path:
        i = next(counter)
        f = write_edges(tmp_path / f"in{i}" / "edges.parquet", src, dst, weight)
        out = tmp_path / f"store{i}"
        shardrank.build_store([f], out, BuildOptions(weight="w" if weight is not None else None, **opts))
        return out

    return make


def random_graph(rng: np.random.Generator, n: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    """A random multigraph with duplicates, self-loops and (usually) dead ends."""
    src = rng.integers(0, n, m)
    dst = rng.integers(0, n, m)
    return src, dst


# --- store round trips (shared by tests/unit/test_store_*, tests/property, tests/e2e) ---------------


def read_store_csr(store: Path) -> tuple[list[Any], np.ndarray, np.ndarray, np.ndarray | None]:
    """(keys in id order, indptr, indices, weights) of the in-edge CSR read straight from the shards.

    Row j holds the source ids of destination j, ascending; built from StoreReader.shard(i)
    block by block and the store's read slots.
    """
    r = shardrank.open_store(store)
    indptr = [np.zeros(1, dtype=np.int64)]
    indices, weights = [], []
    base = 0
    for i in range(r.n_blocks):
        sh = r.shard(i)
        assert sh.info.first_node == sum(a.shape[0] for a in indptr) - 1  # blocks tile 0..N-1
        indptr.append(np.asarray(sh.offsets[1:], dtype=np.int64) + base)
        base += int(sh.offsets[-1])
        indices.append(np.asarray(sh.sources, dtype=np.int64))
        if sh.weights is not None:
            weights.append(np.asarray(sh.weights))
    w = np.concatenate(weights) if r.weighted else None
    ptr, idx = np.concatenate(indptr), np.concatenate(indices)
    slot = r.read_slot()
    if slot is not None:
        # the shards hold read slots (store/slots.py): back to ids, each row sorted by id again
        import scipy.sparse as sp

        idx = ids_by_slot(np.asarray(slot))[idx]
        m = sp.csr_matrix((w if w is not None else np.ones(idx.size), idx, ptr),
                          shape=(r.n_nodes, r.n_nodes))
        m.sort_indices()
        ptr, idx = m.indptr.astype(np.int64), m.indices.astype(np.int64)
        w = m.data if w is not None else None
    return r.keys().to_pylist(), ptr, idx, w


def reference_csr(src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None,
                  extra_nodes: Sequence[Any] = (), self_loops: str = "keep") -> tuple[list[Any], Any]:
    """The normalised edge set built independently with scipy.sparse (coo -> csr sums duplicates).

    Ids follow sorted(unique keys): numeric order for ints, code point order for strings.
    Returns (keys, csr) with csr[dst_id, src_id] = summed weight (or the duplicate count).
    """
    import scipy.sparse as sp

    keys = sorted(set(src) | set(dst) | set(extra_nodes))
    ids = {k: i for i, k in enumerate(keys)}
    s = np.array([ids[k] for k in src], dtype=np.int64)
    d = np.array([ids[k] for k in dst], dtype=np.int64)
    w = np.ones(len(s)) if weight is None else np.asarray(weight, dtype=np.float64)
    if self_loops == "drop":
        keep = s != d
        s, d, w = s[keep], d[keep], w[keep]
    n = len(keys)
    m = sp.coo_matrix((w, (d, s)), shape=(n, n)).tocsr()  # duplicates are summed here
    m.sum_duplicates()
    m.sort_indices()
    return keys, m


def assert_store_matches(store: Path, src: Sequence[Any], dst: Sequence[Any],
                         weight: Sequence[float] | None = None, extra_nodes: Sequence[Any] = (),
                         self_loops: str = "keep") -> None:
    """The store's keys and in-edges equal the scipy reference (weights to 1e-12 relative)."""
    keys, indptr, indices, w = read_store_csr(store)
    ref_keys, ref = reference_csr(src, dst, weight, extra_nodes, self_loops)
    assert keys == ref_keys
    np.testing.assert_array_equal(indptr, ref.indptr)
    np.testing.assert_array_equal(indices, ref.indices)
    if weight is None:
        assert w is None
    else:
        assert w is not None
        np.testing.assert_allclose(w, ref.data, rtol=1e-12, atol=0)
