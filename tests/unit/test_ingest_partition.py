"""The counting-sort build path (ingest/partition.py) gives the store the SQL path gives.

Reference: the SQL path (DuckDB join + GROUP BY + ORDER BY) of the same build, and an
independent scipy.sparse CSR of the same edge set (duplicates merged) built from the file.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp

import shardrank
from shardrank import BuildOptions
from shardrank.ingest import build as build_mod
from shardrank.ingest import partition
from shardrank.store.reader import StoreReader
from tests.conftest import read_store_csr


def _write(dirpath: Path, src: np.ndarray, dst: np.ndarray, parts: int = 3) -> list[Path]:
    dirpath.mkdir(parents=True, exist_ok=True)
    out = []
    for j, cut in enumerate(np.array_split(np.arange(src.shape[0]), parts)):
        f = dirpath / f"part-{j}.parquet"
        pq.write_table(pa.table({"src": src[cut], "dst": dst[cut]}), f)
        out.append(f)
    return out


def _store_arrays(path: Path) -> dict[str, np.ndarray]:
    r = StoreReader.open(path, checksums=True)
    out = {
        "keys": np.asarray(r.keys().to_numpy()),
        "out_degree": np.array(r.out_degree()),
        "in_degree": np.array(r.in_degree()),
        "out_weight": np.array(r.out_weight()),
        "read_slot": np.array(r.read_slot()),
    }
    for i in range(r.n_blocks):
        sh = r.shard(i)
        out[f"offsets{i}"] = np.array(sh.offsets)
        out[f"sources{i}"] = np.array(sh.sources)
    return out


def _build(
    files: list[Path], out: Path, sql: bool, monkeypatch: pytest.MonkeyPatch, **kw: object
) -> shardrank.StoreManifest:
    with monkeypatch.context() as m:
        if sql:
            m.setattr(build_mod, "plan_integer_build", lambda *a, **k: None)
        return shardrank.build_store(files, out, BuildOptions(**kw))  # type: ignore[arg-type]


@pytest.fixture
def tiny_ranges(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """Many spill ranges and many sort groups on a small graph (the bounded-memory path)."""
    monkeypatch.setattr(partition, "MIN_CAP_EDGES", 700)
    monkeypatch.setattr(partition, "MIN_EDGES_PER_SPILL", 50)
    monkeypatch.setattr(partition, "_plan_for", _small_cap(partition._plan_for))
    yield


def _small_cap(real):  # type: ignore[no-untyped-def]
    def plan(lo: int, hi: int, n_rows: int, memory: int) -> partition.IntPlan | None:
        p = real(lo, hi, n_rows, memory)
        return None if p is None else partition.IntPlan(p.lo, p.span, p.n_rows, 700, p.memory)

    return plan


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("loops", ["keep", "drop"])
def test_same_store_as_sql_path(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, tiny_ranges: None, seed: int, loops: str
) -> None:
    rng = np.random.default_rng(seed)
    n, m = int(rng.integers(5, 400)), int(rng.integers(50, 6000))
    keys = int(rng.integers(-(10**9), 10**9)) + rng.choice(7 * n, n, replace=False)
    src, dst = keys[rng.integers(0, n, m)], keys[rng.integers(0, n, m)]
    files = _write(tmp_path / "in", src, dst)
    bn = int(rng.integers(1, 200))
    fast = _build(files, tmp_path / "fast", False, monkeypatch, block_nodes=bn, self_loops=loops)
    slow = _build(files, tmp_path / "sql", True, monkeypatch, block_nodes=bn, self_loops=loops)
    assert (fast.options["build_path"], slow.options["build_path"]) == ("counting-sort", "sql")
    a, b = _store_arrays(tmp_path / "fast"), _store_arrays(tmp_path / "sql")
    assert a.keys() == b.keys()
    for k in a:
        assert a[k].dtype == b[k].dtype and np.array_equal(a[k], b[k]), k
    assert fast.counts == slow.counts
    # independent check: scipy.sparse CSR of the deduplicated edge set (rows = destinations)
    ids = {int(k): i for i, k in enumerate(a["keys"])}
    keep = src != dst if loops == "drop" else np.ones(m, dtype=bool)
    s_id = np.array([ids[int(x)] for x in src[keep]], dtype=np.int64)
    d_id = np.array([ids[int(x)] for x in dst[keep]], dtype=np.int64)
    csr = sp.csr_matrix((np.ones(s_id.shape[0]), (d_id, s_id)), shape=(len(ids), len(ids)))
    csr.sum_duplicates()
    _, got_ptr, got_src, _ = read_store_csr(tmp_path / "fast")
    assert np.array_equal(got_ptr, csr.indptr) and np.array_equal(got_src, csr.indices)
    assert np.array_equal(a["in_degree"], np.diff(csr.indptr))


def test_loose_statistics_fall_back_to_a_measured_range(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # footer statistics narrower than the data: the scatter pass notices and measures the range
    src, dst = np.array([5, 6, 7, 100]), np.array([6, 7, 5, 5])
    files = _write(tmp_path / "in", src, dst, parts=1)
    monkeypatch.setattr(partition, "_stats_range", lambda *a: (5, 7))
    fast = _build(files, tmp_path / "fast", False, monkeypatch)
    slow = _build(files, tmp_path / "sql", True, monkeypatch)
    assert fast.options["build_path"] == "counting-sort" and fast.counts == slow.counts
    a, b = _store_arrays(tmp_path / "fast"), _store_arrays(tmp_path / "sql")
    for k in a:
        assert np.array_equal(a[k], b[k]), k


def test_wide_key_range_takes_the_sql_path(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    src, dst = np.array([0, 2**40, 3]), np.array([2**40, 3, 0])
    files = _write(tmp_path / "in", src, dst, parts=1)
    m = _build(files, tmp_path / "s", False, monkeypatch)
    assert m.options["build_path"] == "sql"
    # statistics that lie about a wide range: the measured range is too wide, SQL path again
    monkeypatch.setattr(partition, "_stats_range", lambda *a: (0, 3))
    m = _build(files, tmp_path / "s2", False, monkeypatch)
    assert m.options["build_path"] == "sql" and m.n_edges == 3


@pytest.mark.parametrize(
    "src,dst",
    [
        ([1, 2, 3], [1, 2, 3]),  # only self-loops: no edge left when they are dropped
        ([-(2**63), -(2**63) + 5], [-(2**63) + 5, -(2**63)]),  # keys at the bottom of int64
        ([2**63 - 1, 2**63 - 3], [2**63 - 3, 2**63 - 1]),  # and at the top
    ],
)
@pytest.mark.parametrize("loops", ["keep", "drop"])
def test_edge_cases_match_the_sql_path(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, src: list[int], dst: list[int], loops: str
) -> None:
    files = _write(
        tmp_path / "in", np.array(src, dtype=np.int64), np.array(dst, dtype=np.int64), parts=1
    )
    fast = _build(files, tmp_path / "fast", False, monkeypatch, self_loops=loops)
    slow = _build(files, tmp_path / "sql", True, monkeypatch, self_loops=loops)
    assert fast.options["build_path"] == "counting-sort"
    a, b = _store_arrays(tmp_path / "fast"), _store_arrays(tmp_path / "sql")
    for k in a:
        assert np.array_equal(a[k], b[k]), k
    assert fast.counts == slow.counts and fast.n_edges == slow.n_edges
