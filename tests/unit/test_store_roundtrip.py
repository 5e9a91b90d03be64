"""Round trip: the in-edges read back from the shards equal the normalised input edge set.

Every check compares against an independent construction: the input table read back with
pyarrow (not DuckDB) and turned into a CSR matrix by scipy.sparse (coo -> csr sums duplicate
entries; see the scipy.sparse.coo_matrix documentation), with ids given by Python's
sorted(unique keys). Helpers live in tests/conftest.py.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions
from tests.conftest import assert_store_matches, random_graph, read_store_csr, reference_csr

BLOCK_SIZES = [1, 3, 64, None]  # None: the default of settings.BLOCK_NODES


def _build(tmp_path: Path, table: dict[str, Any], name: str = "e", **opts: Any) -> tuple[Path, Any]:
    f = tmp_path / f"{name}.parquet"
    pq.write_table(pa.table(table), f)
    out = tmp_path / f"{name}.store"
    if opts.get("block_nodes", 0) is None:
        opts.pop("block_nodes")
    m = shardrank.build_store([f], out, BuildOptions(**opts))
    return out, m


def _read_back(f: Path) -> dict[str, list[Any]]:
    """The input as the reference sees it: read with pyarrow, not DuckDB."""
    return pq.read_table(f).to_pydict()


@pytest.mark.parametrize("block_nodes", BLOCK_SIZES)
@pytest.mark.parametrize("self_loops", ["keep", "drop"])
def test_int_keys_random_multigraph(
    tmp_path: Path, block_nodes: int | None, self_loops: str
) -> None:
    rng = np.random.default_rng(11)
    src, dst = random_graph(rng, 120, 600)  # duplicates, self-loops, dead ends, target-only nodes
    # spread the keys out and make some negative: ids must follow numeric order, not text order
    src, dst = src * 7 - 300, dst * 7 - 300
    out, m = _build(
        tmp_path, {"src": src, "dst": dst}, block_nodes=block_nodes, self_loops=self_loops
    )
    d = _read_back(tmp_path / "e.parquet")
    assert_store_matches(out, d["src"], d["dst"], self_loops=self_loops)
    keys, ref = reference_csr(d["src"], d["dst"], self_loops=self_loops)
    assert m.n_nodes == len(keys) and m.n_edges == ref.nnz
    loops = sum(1 for s, t in zip(d["src"], d["dst"], strict=True) if s == t)
    kept_rows = len(d["src"]) - (loops if self_loops == "drop" else 0)
    assert m.counts["duplicates_merged"] == kept_rows - ref.nnz
    assert m.counts["self_loops"] == (
        int(ref.diagonal().astype(bool).sum()) if self_loops == "keep" else 0
    )
    assert m.counts["self_loop_rows_dropped"] == (loops if self_loops == "drop" else 0)
    out_deg = np.diff(ref.tocsc().indptr)  # column j of A[dst, src] holds source j's out-links
    assert m.counts["dead_ends"] == int(np.count_nonzero(out_deg == 0))
    assert m.counts["no_in_links"] == int(np.count_nonzero(np.diff(ref.indptr) == 0))
    r = shardrank.open_store(out)
    np.testing.assert_array_equal(r.out_degree(), out_deg)
    np.testing.assert_array_equal(r.in_degree(), np.diff(ref.indptr))
    np.testing.assert_array_equal(r.out_weight(), out_deg.astype(np.float64))
    bn = block_nodes or shardrank.settings.BLOCK_NODES
    assert [b.n_nodes for b in m.blocks] == [
        min(bn, m.n_nodes - i) for i in range(0, m.n_nodes, bn)
    ]
    shardrank.verify_store(r)


def test_target_only_nodes_are_dead_ends(tmp_path: Path) -> None:
    # 30 and 40 appear only as targets: they are nodes, with no out-links
    out, m = _build(tmp_path, {"src": [1, 2, 1], "dst": [2, 30, 40]})
    keys, *_ = read_store_csr(out)
    assert keys == [1, 2, 30, 40]
    assert m.counts["dead_ends"] == 2
    np.testing.assert_array_equal(shardrank.open_store(out).out_degree(), [2, 1, 0, 0])


@pytest.mark.parametrize("block_nodes", [1, 3, None])
def test_string_keys_in_code_point_order(tmp_path: Path, block_nodes: int | None) -> None:
    # invented hosts under the reserved .example domain; upper case, digits and non-ASCII keys
    # check the order: DuckDB compares VARCHAR byte-wise in UTF-8, which is code point order,
    # the order of Python's sorted() on str (common practice: UTF-8 preserves code point order)
    pages = [
        "https://b.example/",
        "https://a.example/z",
        "https://a.example/Z",
        "https://a.example/10",
        "https://a.example/9",
        "https://é.example/",
        "https://a.example/ä",
        "https://a.example/ab",
    ]
    rng = np.random.default_rng(3)
    src = [pages[i] for i in rng.integers(0, len(pages), 60)]
    dst = [pages[i] for i in rng.integers(0, len(pages) - 1, 60)]  # the last page only links out
    out, _ = _build(tmp_path, {"src": src, "dst": dst}, block_nodes=block_nodes)
    d = _read_back(tmp_path / "e.parquet")
    assert_store_matches(out, d["src"], d["dst"])
    keys, *_ = read_store_csr(out)
    assert keys == sorted(set(src) | set(dst))


@pytest.mark.parametrize("block_nodes", [1, 3, 64])
@pytest.mark.parametrize("self_loops", ["keep", "drop"])
def test_weights_of_duplicates_are_summed(
    tmp_path: Path, block_nodes: int, self_loops: str
) -> None:
    rng = np.random.default_rng(5)
    src, dst = random_graph(rng, 40, 300)
    w = rng.uniform(0.01, 10.0, 300)
    out, m = _build(
        tmp_path,
        {"src": src, "dst": dst, "w": w},
        weight="w",
        block_nodes=block_nodes,
        self_loops=self_loops,
    )
    d = _read_back(tmp_path / "e.parquet")
    assert_store_matches(out, d["src"], d["dst"], d["w"], self_loops=self_loops)
    _, ref = reference_csr(d["src"], d["dst"], d["w"], self_loops=self_loops)
    r = shardrank.open_store(out)
    # out-weight of a source = its column sum of A[dst, src]
    np.testing.assert_allclose(r.out_weight(), np.asarray(ref.sum(axis=0)).ravel(), rtol=1e-12)
    assert m.weighted and m.counts["duplicates_merged"] > 0
    shardrank.verify_store(r)


def test_integer_weights_and_string_keys(tmp_path: Path) -> None:
    src = ["pkg-a", "pkg-a", "pkg-b", "pkg-c", "pkg-a"]
    dst = ["pkg-b", "pkg-b", "pkg-c", "pkg-a", "pkg-c"]
    w = [2, 3, 1, 7, 1]
    out, m = _build(tmp_path, {"src": src, "dst": dst, "n": w}, weight="n")
    assert_store_matches(out, src, dst, w)
    # worked by hand: pkg-a -> pkg-b carries 2 + 3 = 5
    keys, indptr, indices, wt = read_store_csr(out)
    b = keys.index("pkg-b")
    assert wt is not None and wt[indptr[b] : indptr[b + 1]].tolist() == [5.0]
    assert m.counts["duplicates_merged"] == 1


@pytest.mark.parametrize("fmt", ["parquet", "csv"])
def test_nodes_file_adds_isolated_nodes(tmp_path: Path, fmt: str) -> None:
    src, dst = ["b.example", "c.example"], ["c.example", "b.example"]
    extra = ["a.example", "c.example", "z.example"]  # c is already a node; a and z are isolated
    nodes = tmp_path / f"nodes.{fmt}"
    if fmt == "parquet":
        pq.write_table(pa.table({"key": extra}), nodes)
    else:
        nodes.write_text("key\n" + "\n".join(extra) + "\n")
    out, m = _build(tmp_path, {"src": src, "dst": dst}, nodes=[str(nodes)])
    assert_store_matches(out, src, dst, extra_nodes=extra)
    assert m.n_nodes == 4 and m.counts["dead_ends"] == 2 and m.counts["no_in_links"] == 2


def test_nodes_file_with_int_keys_and_block_size_one(tmp_path: Path) -> None:
    nodes = tmp_path / "nodes.parquet"
    pq.write_table(pa.table({"id": [100, -1, 5]}), nodes)  # no 'key' column: the first one
    out, m = _build(tmp_path, {"src": [5, 6], "dst": [6, 7]}, nodes=[str(nodes)], block_nodes=1)
    assert_store_matches(out, [5, 6], [6, 7], extra_nodes=[100, -1, 5])
    assert [b.n_edges for b in m.blocks] == [0, 0, 1, 1, 0]  # keys -1, 5, 6, 7, 100


@pytest.mark.parametrize(
    ("width", "dtype"), [("auto", "<u4"), (16, "<u2"), (32, "<u4"), (64, "<u8")]
)
def test_id_width_sets_the_source_dtype(tmp_path: Path, width: Any, dtype: str) -> None:
    src, dst = [3, 1, 2, 2], [1, 2, 3, 3]
    out, m = _build(tmp_path, {"src": src, "dst": dst}, id_width=width, block_nodes=2)
    assert m.source_dtype == dtype
    assert shardrank.open_store(out).shard(0).sources.dtype.str == dtype
    assert_store_matches(out, src, dst)


def test_manifest_records_counts_and_options(tmp_path: Path) -> None:
    src, dst = [1, 1, 2, 2, 3], [2, 2, 2, 3, 9]
    out, m = _build(tmp_path, {"src": src, "dst": dst}, self_loops="drop")
    doc = json.loads((out / "manifest.json").read_text())
    # rows 5; self-loop 2->2 dropped; 1->2 twice merged; edges 1->2, 2->3, 3->9
    assert doc["counts"]["rows_read"] == 5
    assert doc["counts"]["self_loop_rows_dropped"] == 1
    assert doc["counts"]["duplicates_merged"] == 1
    assert doc["n_edges"] == 3 and doc["n_nodes"] == 4
    assert doc["options"]["self_loops"] == "drop"
    assert doc["counts"]["dead_ends"] == 1  # node 9


def test_shards_open_memory_mapped_without_pickle(tmp_path: Path) -> None:
    out, _ = _build(tmp_path, {"src": [1, 2], "dst": [2, 1]}, weight=None)
    for f in sorted(out.rglob("*.npy")):
        a = np.load(f, mmap_mode="r", allow_pickle=False)  # numpy .npy format: no object arrays
        assert isinstance(a, np.memmap) and a.dtype.byteorder in ("<", "=", "|")
