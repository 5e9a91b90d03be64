"""Every bad input gives a clear error, exit 2, no traceback, and leaves nothing behind.

Inputs come from tests/fixtures/bad_inputs/ (one tiny file per failure mode; regenerate with
its make.py) or are written here when they must be large. The contract checked is the issue's:
what is wrong, which file/column, what to do (an `error:` and a `hint:` line); exit 2; neither
STORE nor its temporary `.STORE.partial-PID` sibling remains.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shardrank.cli.main import main

FIX = Path(__file__).resolve().parents[1] / "fixtures" / "bad_inputs"


@pytest.fixture
def out(tmp_path: Path) -> Path:
    return tmp_path / "work" / "crawl.store"


def _nothing_left(out: Path) -> None:
    assert not out.exists()
    if out.parent.exists():
        assert [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")] == []


def _fails(args: list[str], out: Path, capsys: pytest.CaptureFixture[str], *needles: str) -> str:
    """Run `shardrank build ARGS --out OUT` in process; exit 2, one error and one hint line."""
    capsys.readouterr()
    assert main(["build", *args, "--out", str(out), "-q"]) == 2
    cap = capsys.readouterr()
    err = cap.err
    assert "Traceback" not in err and cap.out == ""
    lines = err.strip().splitlines()
    assert lines[0].startswith("error: ") and any(ln.startswith("hint:") for ln in lines), err
    for n in needles:
        assert n in err, f"{n!r} not in {err!r}"
    _nothing_left(out)
    return err


def test_missing_file(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "no-such-file.parquet")], out, capsys, "no-such-file.parquet", "no such file")


def test_glob_matching_nothing(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "nothing-*.parquet")], out, capsys, "no files match")


def test_binary_junk(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "junk.bin")], out, capsys, "junk.bin", "neither Parquet nor")


def test_truncated_parquet(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "truncated.parquet")], out, capsys, "truncated.parquet", "Parquet")


def test_truncated_parquet_among_good_files(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    d = tmp_path / "parts"
    d.mkdir()
    shutil.copy(FIX / "good.parquet", d / "part-0.parquet")
    shutil.copy(FIX / "truncated.parquet", d / "part-1.parquet")
    _fails([str(d)], out, capsys, "part-1.parquet")


def test_text_with_a_parquet_name(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "text_named.parquet")], out, capsys, "text_named.parquet", "not a Parquet file"
    )


def test_missing_column_lists_the_columns_found(
    out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    err = _fails(
        [str(FIX / "other_columns.parquet"), "--dst", "dst"],
        out,
        capsys,
        "other_columns.parquet",
        "'dst'",
        "found: from_id, to_id, n",
        "--dst",
    )
    assert "pass --dst" in err


def test_missing_weight_column(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "good.parquet"), "--weight", "w"],
        out,
        capsys,
        "good.parquet",
        "'w'",
        "found: src, dst",
    )


def test_null_keys_are_counted(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "null_keys.parquet")],
        out,
        capsys,
        "null_keys.parquet",
        "3 of 5 rows",
        "--drop-nulls",
    )


def test_drop_nulls_skips_and_reports_them(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert (
        main(["build", str(FIX / "null_keys.parquet"), "--drop-nulls", "--out", str(out), "-q"])
        == 0
    )
    assert main(["inspect", str(out), "--json"]) == 0
    facts = json.loads(capsys.readouterr().out)
    # rows 1->2 and 5->1 survive: nodes 1, 2, 5
    assert (facts["rows_read"], facts["rows_dropped_null"], facts["edges"], facts["nodes"]) == (
        5,
        3,
        2,
        3,
    )
    m = json.loads((out / "manifest.json").read_text())
    assert m["counts"]["rows_dropped_null"] == 3


def test_mixed_key_types_in_one_file(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "mixed_key_types.parquet")],
        out,
        capsys,
        "mixed_key_types.parquet",
        "mixed types",
        "'src'",
        "'dst'",
    )


def test_mixed_key_types_in_a_csv(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "mixed_key_types.csv")], out, capsys, "mixed_key_types.csv", "mixed types")


def test_mixed_key_types_across_files(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "mixed_files")], out, capsys, "part-0.parquet", "part-1.parquet", "mixed types"
    )


def test_int_parquet_with_text_csv(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "more.csv").write_text("src,dst\na.example,b.example\n")
    _fails(
        [str(FIX / "good.parquet"), str(tmp_path / "more.csv")],
        out,
        capsys,
        "good.parquet",
        "mixed types",
    )


def test_nodes_file_of_another_key_type(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "good.parquet"), "--nodes", str(FIX / "string_nodes.parquet")],
        out,
        capsys,
        "string_nodes.parquet",
        "--nodes",
    )


@pytest.mark.parametrize("name", ["empty.parquet", "header_only.csv"])
def test_no_rows(name: str, out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / name)], out, capsys, name, "no edges")


def test_zero_byte_file(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "empty.csv")], out, capsys, "empty.csv", "empty")


def test_only_null_rows_with_drop_nulls(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    f = tmp_path / "nulls.parquet"
    pq.write_table(pa.table({"src": pa.array([None, None], pa.int64()), "dst": [1, 2]}), f)
    _fails([str(f), "--drop-nulls"], out, capsys, "nulls.parquet", "null")


@pytest.mark.parametrize(
    ("name", "what"),
    [
        ("negative", "zero or negative"),
        ("zero", "zero or negative"),
        ("nan", "NaN"),
        ("infinite", "infinite"),
    ],
)
def test_bad_weights(name: str, what: str, out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = f"weight_{name}.parquet"
    _fails([str(FIX / f), "--weight", "w"], out, capsys, f, "'w'", f"1 {what}", "positive finite")


def test_text_weights(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "text_weights.csv"), "--weight", "w"],
        out,
        capsys,
        "text_weights.csv",
        "'w'",
        "not a number",
    )


def test_float_key_column(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "float_keys.parquet")],
        out,
        capsys,
        "float_keys.parquet",
        "'src'",
        "DOUBLE",
        "BIGINT or VARCHAR",
    )


def test_ambiguous_header(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails(
        [str(FIX / "ambiguous_header.csv")],
        out,
        capsys,
        "ambiguous_header.csv",
        "'pkg-a'",
        "--header",
    )


def test_text_files_that_disagree_on_a_header(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "a.csv").write_text("src,dst\n1,2\n")
    (tmp_path / "b.csv").write_text("2,3\n3,1\n")
    _fails(
        [str(tmp_path / "a.csv"), str(tmp_path / "b.csv")], out, capsys, "a.csv", "b.csv", "header"
    )


def test_more_nodes_than_the_id_width_allows(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    n = 65_537  # one more than 16-bit ids can number
    f = tmp_path / "ring.parquet"
    pq.write_table(pa.table({"src": np.arange(n), "dst": (np.arange(n) + 1) % n}), f)
    _fails([str(f), "--id-width", "16"], out, capsys, "65,537 nodes", "16-bit", "--id-width")
    assert main(["build", str(f), "--id-width", "16", "--out", str(out), "-q"]) == 2
    f2 = tmp_path / "fits.parquet"  # exactly 65,536 nodes fit
    pq.write_table(pa.table({"src": np.arange(n - 1), "dst": (np.arange(n - 1) + 1) % (n - 1)}), f2)
    assert main(["build", str(f2), "--id-width", "16", "--out", str(out), "-q"]) == 0


def test_existing_store_without_overwrite(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["build", str(FIX / "good.parquet"), "--out", str(out), "-q"]) == 0
    before = (out / "manifest.json").read_bytes()
    capsys.readouterr()
    assert main(["build", str(FIX / "good.parquet"), "--out", str(out), "-q"]) == 2
    err = capsys.readouterr().err
    assert "already exists" in err and "--overwrite" in err
    assert (out / "manifest.json").read_bytes() == before
    assert [p.name for p in out.parent.iterdir()] == [out.name]
    assert main(["build", str(FIX / "good.parquet"), "--out", str(out), "--overwrite", "-q"]) == 0
    assert main(["verify", str(out), "-q"]) == 0


def test_existing_plain_file_as_store(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out.parent.mkdir(parents=True)
    out.write_text("my notes")
    assert main(["build", str(FIX / "good.parquet"), "--out", str(out), "-q"]) == 2
    assert "already exists" in capsys.readouterr().err
    assert out.read_text() == "my notes"


def test_bad_memory_value(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _fails([str(FIX / "good.parquet"), "--memory", "lots"], out, capsys, "--memory", "8GB")


@pytest.mark.parametrize("opt", [["--block-nodes", "0"], ["--threads", "0"]])
def test_bad_numbers(opt: list[str], out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    assert main(["build", str(FIX / "good.parquet"), *opt, "--out", str(out), "-q"]) == 2
    err = capsys.readouterr().err
    assert opt[0] in err and "Traceback" not in err
    _nothing_left(out)


def test_json_log_format_reports_the_error(out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    assert (
        main(["build", str(FIX / "float_keys.parquet"), "--out", str(out), "--log-format", "json"])
        == 2
    )
    events = [json.loads(ln) for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    last = events[-1]
    assert last["exit_code"] == 2 and "float_keys.parquet" in json.dumps(last)
    _nothing_left(out)


# --- a few as a real process: the console entry point, stderr and exit status as a shell sees them


def _run(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    cmd = [sys.executable, "-c", "from shardrank.cli.main import entry; entry()", *args]
    return subprocess.run(
        cmd,
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )


@pytest.mark.parametrize(
    ("name", "extra", "needle"),
    [
        ("no-such-file.csv", [], "no such file"),
        ("junk.bin", [], "neither Parquet nor"),
        ("null_keys.parquet", [], "--drop-nulls"),
        ("weight_nan.parquet", ["--weight", "w"], "NaN"),
    ],
)
def test_as_a_subprocess(name: str, extra: list[str], needle: str, out: Path) -> None:
    out.parent.mkdir(parents=True)
    p = _run(["build", str(FIX / name), *extra, "--out", str(out)], out.parent)
    assert p.returncode == 2, p.stderr
    assert "Traceback" not in p.stderr and needle in p.stderr
    assert "error:" in p.stderr and "hint:" in p.stderr
    _nothing_left(out)


def test_too_little_memory_is_a_clear_error(
    tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # DuckDB raised OutOfMemoryException through the CLI as a traceback (exit 1) before
    rng = np.random.default_rng(5)
    urls = pa.array(
        [f"https://host{i % 97:03d}.example/s/{i:07d}/page.html" for i in range(200_000)]
    )
    f = tmp_path / "links.parquet"
    pq.write_table(
        pa.table(
            {
                "src": urls.take(rng.integers(0, 200_000, 600_000)),
                "dst": urls.take(rng.integers(0, 200_000, 600_000)),
            }
        ),
        f,
    )
    capsys.readouterr()
    rc = main(["build", str(f), "--memory", "1MB", "--threads", "2", "--out", str(out), "-q"])
    if rc == 0:  # a leaner build path may fit; then the store must be sound
        assert main(["verify", str(out), "-q"]) == 0
        return
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err, err
    assert "ran out of memory" in err and "--memory" in err
    _nothing_left(out)


@pytest.mark.parametrize(
    ("src", "dst", "w"),
    [
        ([1, 1, 2], [2, 2, 1], [1e308, 1e308, 1.0]),  # merged duplicates: 2e308
        ([1, 2, 2], [2, 1, 3], [1.0, 1e308, 1e308]),  # node 2's out-weight: 2e308
    ],
)
def test_weights_whose_sums_overflow(
    src: list[int],
    dst: list[int],
    w: list[float],
    tmp_path: Path,
    out: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    # 2e308 overflows IEEE 754 double precision (largest finite value about 1.8e308): the store
    # would hold infinite weights that verify rejects
    f = tmp_path / "huge.parquet"
    pq.write_table(pa.table({"src": src, "dst": dst, "w": w}), f)
    _fails([str(f), "--weight", "w"], out, capsys, "huge.parquet", "overflows", "scale the weights")


def test_ragged_rows(tmp_path: Path, out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "ragged.csv"
    f.write_text("src,dst\n1,2\n2,3,4\n3,1\n")  # one row has three fields
    _fails([str(f)], out, capsys, "ragged.csv", "one column", "same number of fields")
