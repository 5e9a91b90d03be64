"""Property tests (hypothesis): on random small graphs a built store round-trips and verifies.

The reference is independent of the build: scipy.sparse coo -> csr (which sums duplicate
entries) over ids from Python's sorted(unique keys); counts are recomputed from that matrix.
"""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import shardrank
from shardrank import BuildOptions
from tests.conftest import assert_store_matches, reference_csr

SETTINGS = settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# small keys (unweighted, no --nodes) take the counting-sort build path; far-apart keys the SQL path
int_keys = st.one_of(st.integers(-20, 20), st.integers(-(2**62), 2**62))
# any Unicode text Parquet can hold (no lone surrogates), the empty string and NUL included
str_keys = st.text(st.characters(codec="utf-8", exclude_categories=["Cs"]), max_size=6)


@st.composite
def graphs(draw: Any, keys: st.SearchStrategy[Any]) -> dict[str, Any]:
    pool = draw(st.lists(keys, min_size=1, max_size=12, unique=True))
    pick = st.sampled_from(pool)
    edges = draw(st.lists(st.tuples(pick, pick), min_size=1, max_size=40))
    weighted = draw(st.booleans())
    weights = (
        draw(st.lists(st.floats(0.001, 1000.0), min_size=len(edges), max_size=len(edges)))
        if weighted
        else None
    )
    extra = draw(st.lists(keys, max_size=3))
    return {
        "src": [s for s, _ in edges],
        "dst": [d for _, d in edges],
        "weights": weights,
        "extra": extra,
        "self_loops": draw(st.sampled_from(["keep", "drop"])),
        "block_nodes": draw(st.sampled_from([1, 2, 3, 7, 64, shardrank.settings.BLOCK_NODES])),
        "id_width": draw(st.sampled_from(["auto", 16, 32, 64])),
    }


def _check(g: dict[str, Any], key_type: pa.DataType) -> None:
    src, dst, w, extra = g["src"], g["dst"], g["weights"], g["extra"]
    loops = sum(1 for s, d in zip(src, dst, strict=True) if s == d)
    with tempfile.TemporaryDirectory() as d:
        f = Path(d) / "e.parquet"
        cols: dict[str, Any] = {"src": pa.array(src, key_type), "dst": pa.array(dst, key_type)}
        if w is not None:
            cols["w"] = w
        pq.write_table(pa.table(cols), f)
        nodes: list[str] = []
        if extra:
            pq.write_table(pa.table({"key": pa.array(extra, key_type)}), Path(d) / "n.parquet")
            nodes = [str(Path(d) / "n.parquet")]
        out = Path(d) / "store"
        m = shardrank.build_store(
            [f],
            out,
            BuildOptions(
                weight="w" if w is not None else None,
                self_loops=g["self_loops"],
                block_nodes=g["block_nodes"],
                nodes=nodes,
                id_width=g["id_width"],
            ),
        )
        assert_store_matches(out, src, dst, w, extra, g["self_loops"])
        keys, ref = reference_csr(src, dst, w, extra, g["self_loops"])
        kept_rows = len(src) - (loops if g["self_loops"] == "drop" else 0)
        out_deg = np.diff(ref.tocsc().indptr)
        assert (m.n_nodes, m.n_edges) == (len(keys), ref.nnz)
        assert m.counts["rows_read"] == len(src)
        assert m.counts["duplicates_merged"] == kept_rows - ref.nnz
        assert m.counts["self_loops"] == int(np.count_nonzero(ref.diagonal()))
        assert m.counts["self_loop_rows_dropped"] == (loops if g["self_loops"] == "drop" else 0)
        assert m.counts["dead_ends"] == int(np.count_nonzero(out_deg == 0))
        assert m.counts["no_in_links"] == int(np.count_nonzero(np.diff(ref.indptr) == 0))
        assert m.source_dtype == {"auto": "<u4", 16: "<u2", 32: "<u4", 64: "<u8"}[g["id_width"]]
        r = shardrank.open_store(out, verify=True)
        info = shardrank.verify_store(r)
        assert info["blocks"] == -(-len(keys) // g["block_nodes"])
        facts = shardrank.inspect_store(out)
        assert (facts["nodes"], facts["edges"], facts["dead_ends"]) == (
            len(keys),
            ref.nnz,
            m.counts["dead_ends"],
        )


@SETTINGS
@given(graphs(int_keys))
def test_int_key_graphs_round_trip(g: dict[str, Any]) -> None:
    _check(g, pa.int64())


@SETTINGS
@given(graphs(str_keys))
def test_string_key_graphs_round_trip(g: dict[str, Any]) -> None:
    _check(g, pa.string())
