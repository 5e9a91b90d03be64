"""Every input layout `shardrank build` reads gives the same store as the edge list it holds.

The reference is the edge list the test itself wrote, turned into a CSR matrix by scipy.sparse
(coo -> csr sums duplicates) with ids from Python's sorted(unique keys); see tests/conftest.py.
"""

from __future__ import annotations

import gzip
import json
import shutil
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions
from shardrank.errors import BadInputError
from tests.conftest import assert_store_matches

RNG = np.random.default_rng(2024)
INT_SRC = RNG.integers(0, 50, 200).tolist()
INT_DST = RNG.integers(0, 60, 200).tolist()  # 50..59 only ever appear as targets
HOSTS = [f"https://h{i % 7}.example/p{i}" for i in range(30)]
STR_SRC = [HOSTS[i] for i in RNG.integers(0, 30, 120)]
STR_DST = [HOSTS[i] for i in RNG.integers(0, 30, 120)]


def _text(src: list[Any], dst: list[Any], sep: str = ",", header: str | None = "src,dst") -> str:
    lines = ([header.replace(",", sep)] if header else []) + [
        f"{s}{sep}{d}" for s, d in zip(src, dst, strict=True)
    ]
    return "\n".join(lines) + "\n"


def _build(tmp_path: Path, inputs: list[str | Path], **opts: Any) -> Path:
    out = tmp_path / "out.store"
    shardrank.build_store([str(i) for i in inputs], out, BuildOptions(block_nodes=16, **opts))
    shardrank.verify_store(shardrank.open_store(out))
    return out


def test_csv_with_header(tmp_path: Path) -> None:
    f = tmp_path / "e.csv"
    f.write_text(_text(INT_SRC, INT_DST))
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)


def test_csv_without_header_int_keys(tmp_path: Path) -> None:
    f = tmp_path / "e.csv"
    f.write_text(_text(INT_SRC, INT_DST, header=None))
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)


def test_csv_with_header_string_keys(tmp_path: Path) -> None:
    f = tmp_path / "e.csv"
    f.write_text(_text(STR_SRC, STR_DST))
    assert_store_matches(_build(tmp_path, [f]), STR_SRC, STR_DST)


def test_headerless_string_keys_never_lose_the_first_edge(tmp_path: Path) -> None:
    # every column is text, so a sniffer cannot tell a header from an edge; guessing "header"
    # would silently drop the first edge. The build must ask, and obey --header no.
    src, dst = ["pkg-a", "pkg-b", "pkg-c"], ["pkg-b", "pkg-c", "pkg-a"]
    f = tmp_path / "deps.csv"
    f.write_text(_text(src, dst, header=None))
    with pytest.raises(BadInputError, match="header") as e:
        _build(tmp_path, [f])
    assert "--header" in (e.value.hint or "")
    assert not (tmp_path / "out.store").exists()
    assert_store_matches(_build(tmp_path, [f], header="no"), src, dst)


def test_string_header_named_by_src_dst_options(tmp_path: Path) -> None:
    f = tmp_path / "links.tsv"
    f.write_text(_text(STR_SRC, STR_DST, sep="\t", header="from_url,to_url"))
    assert_store_matches(_build(tmp_path, [f], src="from_url", dst="to_url"), STR_SRC, STR_DST)
    out2 = tmp_path / "yes.store"
    shardrank.build_store([f], out2, BuildOptions(header="yes"))
    assert_store_matches(out2, STR_SRC, STR_DST)


def test_tsv(tmp_path: Path) -> None:
    f = tmp_path / "e.tsv"
    f.write_text(_text(INT_SRC, INT_DST, sep="\t", header=None))
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)


def test_space_separated_edge_list(tmp_path: Path) -> None:
    f = tmp_path / "e.txt"
    f.write_text(
        "# invented: one edge a line, separated by a space\n"
        + _text(INT_SRC, INT_DST, sep=" ", header=None)
    )
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)


def test_comment_lines_anywhere(tmp_path: Path) -> None:
    body = _text(INT_SRC, INT_DST, sep="\t", header=None).splitlines()
    body.insert(0, "# invented edge list, generated for a test")
    body.insert(0, "# Nodes: 60 Edges: 200")
    body.insert(40, "# a comment in the middle")
    f = tmp_path / "e.tsv"
    f.write_text("\n".join(body) + "\n")
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)


def test_csv_gz(tmp_path: Path) -> None:
    f = tmp_path / "e.csv.gz"
    f.write_bytes(gzip.compress(_text(STR_SRC, STR_DST).encode()))
    assert_store_matches(_build(tmp_path, [f]), STR_SRC, STR_DST)


@pytest.mark.skipif(shutil.which("zstd") is None, reason="the zstd command is not installed")
def test_csv_zst(tmp_path: Path) -> None:
    plain = tmp_path / "e.csv"
    plain.write_text(_text(INT_SRC, INT_DST))
    subprocess.run(
        ["zstd", "-q", "--rm", str(plain), "-o", str(tmp_path / "e.csv.zst")], check=True
    )
    assert_store_matches(_build(tmp_path, [tmp_path / "e.csv.zst"]), INT_SRC, INT_DST)


def _parquet_parts(
    d: Path, src: list[Any], dst: list[Any], n_parts: int, hive: bool = False
) -> None:
    for i in range(n_parts):
        sub = d / f"day=2026-01-0{i + 1}" if hive else d
        sub.mkdir(parents=True, exist_ok=True)
        pq.write_table(
            pa.table({"src": src[i::n_parts], "dst": dst[i::n_parts]}),
            sub / f"part-{i:04d}.parquet",
        )


def test_directory_of_parquet_parts(tmp_path: Path) -> None:
    d = tmp_path / "edges"
    _parquet_parts(d, INT_SRC, INT_DST, 4)
    (d / "_SUCCESS").write_text("")  # engine droppings are skipped
    (d / ".part-0000.parquet.crc").write_bytes(b"\x00\x01")
    assert_store_matches(_build(tmp_path, [d]), INT_SRC, INT_DST)


def test_hive_partitioned_directory(tmp_path: Path) -> None:
    d = tmp_path / "crawl"
    _parquet_parts(d, STR_SRC, STR_DST, 3, hive=True)
    assert_store_matches(_build(tmp_path, [d]), STR_SRC, STR_DST)


def test_glob(tmp_path: Path) -> None:
    d = tmp_path / "edges"
    _parquet_parts(d, INT_SRC, INT_DST, 3)
    (d / "notes.parquet.bak").write_text("not an input")
    assert_store_matches(_build(tmp_path, [str(d / "part-*.parquet")]), INT_SRC, INT_DST)


def test_csv_and_parquet_together(tmp_path: Path) -> None:
    half = len(INT_SRC) // 2
    pq.write_table(pa.table({"src": INT_SRC[:half], "dst": INT_DST[:half]}), tmp_path / "a.parquet")
    (tmp_path / "b.csv").write_text(_text(INT_SRC[half:], INT_DST[half:]))
    out = _build(tmp_path, [tmp_path / "a.parquet", tmp_path / "b.csv"])
    assert_store_matches(out, INT_SRC, INT_DST)


def test_weighted_csv_and_named_columns(tmp_path: Path) -> None:
    f = tmp_path / "cites.csv"
    rows = ["citing,cited,n"] + [
        f"{s},{d},{(s + d) % 5 + 1}" for s, d in zip(INT_SRC, INT_DST, strict=True)
    ]
    f.write_text("\n".join(rows) + "\n")
    w = [(s + d) % 5 + 1 for s, d in zip(INT_SRC, INT_DST, strict=True)]
    out = _build(tmp_path, [f], src="citing", dst="cited", weight="n")
    assert_store_matches(out, INT_SRC, INT_DST, w)


def test_default_columns_are_the_first_two(tmp_path: Path) -> None:
    f = tmp_path / "e.parquet"
    pq.write_table(pa.table({"a": INT_SRC, "b": INT_DST, "c": [1.0] * len(INT_SRC)}), f)
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)


def test_parquet_parts_with_int32_and_int64_keys(tmp_path: Path) -> None:
    # both are integer keys: one key space, numeric order
    d = tmp_path / "edges"
    d.mkdir()
    half = len(INT_SRC) // 2
    pq.write_table(
        pa.table(
            {
                "src": pa.array(INT_SRC[:half], pa.int32()),
                "dst": pa.array(INT_DST[:half], pa.int32()),
            }
        ),
        d / "part-0.parquet",
    )
    pq.write_table(
        pa.table(
            {
                "src": pa.array(INT_SRC[half:], pa.int64()),
                "dst": pa.array(INT_DST[half:], pa.int64()),
            }
        ),
        d / "part-1.parquet",
    )
    assert_store_matches(_build(tmp_path, [d]), INT_SRC, INT_DST)


def test_hidden_directories_are_skipped(tmp_path: Path) -> None:
    # a writer's unfinished output (_temporary/, .staging/) must not be read as edges
    d = tmp_path / "edges"
    _parquet_parts(d, INT_SRC, INT_DST, 2)
    _parquet_parts(d / "_temporary" / "0", INT_SRC, INT_DST, 2)
    _parquet_parts(d / ".staging", INT_SRC, INT_DST, 2)
    assert_store_matches(_build(tmp_path, [d]), INT_SRC, INT_DST)
    m = json.loads((tmp_path / "out.store" / "manifest.json").read_text())
    assert m["input"]["n_files"] == 2 and m["counts"]["rows_read"] == len(INT_SRC)


def test_store_built_inside_its_input_directory(tmp_path: Path) -> None:
    # rebuilding `edges/` into `edges/.../store` must not read the old store's nodes.parquet
    d = tmp_path / "edges"
    _parquet_parts(d, INT_SRC, INT_DST, 2)
    out = d / "graph"
    for overwrite in (False, True):
        shardrank.build_store([d], out, BuildOptions(overwrite=overwrite))
        assert_store_matches(out, INT_SRC, INT_DST)


def test_file_names_with_quotes_and_glob_characters(tmp_path: Path) -> None:
    f = tmp_path / "it's [1].parquet"  # an existing name is taken as is, not as a pattern
    pq.write_table(pa.table({"src": INT_SRC, "dst": INT_DST}), f)
    assert_store_matches(_build(tmp_path, [f]), INT_SRC, INT_DST)
