"""`shardrank patch` in process: a good patch verifies; every refused input is exit 2 with an
`error:` and a `hint:` line, no traceback, and nothing left at --out (nor its temporary
sibling)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions
from shardrank.cli.main import main
from tests.conftest import write_edges
from tests.e2e.test_store_compat import _to_version_1


@pytest.fixture
def store(tmp_path: Path) -> Path:
    s = tmp_path / "crawl.store"
    e = write_edges(tmp_path / "in" / "e.parquet", [1, 2, 3, 3], [2, 3, 1, 4])
    shardrank.build_store([e], s)
    return s


def _nothing_left(out: Path) -> None:
    assert not out.exists()
    assert [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")] == []


def _fails(args: list[str], out: Path, capsys: pytest.CaptureFixture[str], *needles: str) -> str:
    capsys.readouterr()
    assert main(["patch", *args, "--out", str(out), "-q"]) == 2
    cap = capsys.readouterr()
    assert "Traceback" not in cap.err and cap.out == ""
    lines = cap.err.strip().splitlines()
    assert lines[0].startswith("error: ") and any(ln.startswith("hint:") for ln in lines), cap.err
    for n in needles:
        assert n in cap.err, f"{n!r} not in {cap.err!r}"
    _nothing_left(out)
    return cap.err


def test_patch_cli_writes_a_sound_store(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    add = write_edges(tmp_path / "d" / "add.csv", [4, 9], [1, 4])
    rem = write_edges(tmp_path / "d" / "rem.parquet", [3, 7], [1, 8])  # (7, 8) is not in the store
    out = tmp_path / "new.store"
    assert (
        main(["patch", str(store), "--add", str(add), "--remove", str(rem), "--out", str(out)]) == 0
    )
    text = capsys.readouterr().out
    assert (
        "2 edges added, 1 removed, 1 removals not in the store, 1 nodes added, 0 vanished" in text
    )
    assert main(["verify", str(out), "-q"]) == 0
    assert shardrank.open_store(out).keys().to_pylist() == [1, 2, 3, 4, 9]
    # an existing --out is refused without --overwrite, accepted with it
    capsys.readouterr()
    assert main(["patch", str(store), "--add", str(add), "--out", str(out), "-q"]) == 2
    assert "already exists" in capsys.readouterr().err
    assert (
        main(["patch", str(store), "--add", str(add), "--out", str(out), "-q", "--overwrite"]) == 0
    )


def test_weighted_store_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    s = tmp_path / "w.store"
    shardrank.build_store(
        [write_edges(tmp_path / "e.parquet", [1, 2], [2, 1], [1.0, 2.0])],
        s,
        BuildOptions(weight="w"),
    )
    add = write_edges(tmp_path / "add.parquet", [1], [3])
    _fails(
        [str(s), "--add", str(add)], tmp_path / "out.store", capsys, "weighted", "shardrank build"
    )


def test_nodes_store_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    s = tmp_path / "n.store"
    nodes = tmp_path / "nodes.parquet"
    pq.write_table(pa.table({"key": [1, 2, 77]}), nodes)
    shardrank.build_store(
        [write_edges(tmp_path / "e.parquet", [1, 2], [2, 1])], s, BuildOptions(nodes=[str(nodes)])
    )
    add = write_edges(tmp_path / "add.parquet", [1], [3])
    _fails([str(s), "--add", str(add)], tmp_path / "out.store", capsys, "--nodes")


def test_version_1_store_is_refused(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    v1 = tmp_path / "v1.store"
    shutil.copytree(store, v1)
    _to_version_1(v1)
    add = write_edges(tmp_path / "add.parquet", [1], [3])
    _fails([str(v1), "--add", str(add)], tmp_path / "out.store", capsys, "version 1", "rebuild")


def test_key_type_mismatch_is_refused(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    add = write_edges(tmp_path / "add.parquet", ["a.example/"], ["b.example/"])
    _fails(
        [str(store), "--add", str(add)],
        tmp_path / "out.store",
        capsys,
        "add.parquet",
        "text keys",
        "integer keys",
    )


def test_null_keys_are_refused(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    ok = write_edges(tmp_path / "d" / "a-ok.parquet", [1], [3])
    bad = tmp_path / "d" / "b-nulls.parquet"
    pq.write_table(
        pa.table({"src": pa.array([1, 2], pa.int64()), "dst": pa.array([None, 3], pa.int64())}), bad
    )
    _fails(
        [str(store), "--remove", str(ok), str(bad)],
        tmp_path / "out.store",
        capsys,
        "b-nulls.parquet",
        "'dst'",
        "null",
    )


def test_missing_column_and_no_edge_left(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    wrong = write_edges(tmp_path / "wrong.parquet", [1], [2], names=("from", "to", "w"))
    _fails(
        [str(store), "--add", str(wrong)],
        tmp_path / "out.store",
        capsys,
        "no column 'src'",
        "--src",
    )
    everything = write_edges(tmp_path / "all.parquet", [1, 2, 3, 3], [2, 3, 1, 4])
    _fails([str(store), "--remove", str(everything)], tmp_path / "out.store", capsys, "every edge")
