"""`shardrank rank` on bad input: the exit code, an `error:` line that says what is wrong, a
`hint:` line that says what to do, and nothing written."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shardrank.cli.main import main
from tests.conftest import write_edges


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    tmp = tmp_path_factory.mktemp("bad")
    f = write_edges(tmp / "e.parquet", [1, 2, 3, 3, 4], [2, 3, 1, 4, 5])
    out = tmp / "store"
    assert main(["build", str(f), "--out", str(out), "-q", "--block-nodes", "2"]) == 0
    return out


def _rank(store: Path, run: Path, *args: str) -> int:
    return main(["rank", str(store), "--out", str(run), "--threads", "1", *args])


def _err(capsys: pytest.CaptureFixture[str]) -> str:
    return capsys.readouterr().err


@pytest.mark.parametrize("d", ["0", "1", "1.5", "nan", "-0.2", "inf"])
def test_damping_outside_0_1(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], d: str
) -> None:
    assert _rank(store, tmp_path / "r", "--damping", d) == 2
    err = _err(capsys)
    assert "error:" in err and "0 < d < 1" in err and "hint:" in err
    assert not (tmp_path / "r").exists()


@pytest.mark.parametrize("tol", ["0", "-1e-9", "nan"])
def test_tol_not_positive(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], tol: str
) -> None:
    # "--tol=-1e-9": argparse would read a separate "-1e-9" as an option name
    assert _rank(store, tmp_path / "r", f"--tol={tol}") == 2
    err = _err(capsys)
    assert "error:" in err and "--tol" in err and "positive" in err and "hint:" in err
    assert not (tmp_path / "r").exists()


@pytest.mark.parametrize(
    "args", [["--max-iter", "0"], ["--threads", "0"], ["--checkpoint-every", "0"]]
)
def test_other_bad_numbers(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str]
) -> None:
    assert main(["rank", str(store), "--out", str(tmp_path / "r"), *args]) == 2
    assert args[0] in _err(capsys)


def _teleport_csv(tmp: Path, text: str) -> Path:
    p = tmp / "teleport.csv"
    p.write_text(text)
    return p


def test_unknown_teleport_keys_are_listed(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rows = "".join(f"{k},1.0\n" for k in [1, 2, 901, 902, 903, 904, 905, 906, 907])
    t = _teleport_csv(tmp_path, "key,weight\n" + rows)
    assert _rank(store, tmp_path / "r", "--teleport", str(t)) == 2
    err = _err(capsys)
    assert (
        "7 teleport keys are not nodes" in err and "901" in err and "907" not in err
    )  # a few, not all
    assert "--ignore-unknown-keys" in err
    assert not (tmp_path / "r").exists()


def test_ignore_unknown_keys_skips_and_reports(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    t = _teleport_csv(tmp_path, "key,weight\n1,2.0\n4,1.0\n901,5.0\n902,1.0\n")
    assert _rank(store, tmp_path / "r", "--teleport", str(t), "--ignore-unknown-keys") == 0
    assert "ignored 2 keys" in _err(capsys)
    doc = json.loads((tmp_path / "r" / "run.json").read_text())
    assert doc["teleport"]["unknown_keys_ignored"] == 2 and doc["teleport"]["entries"] == 2
    # the same scores as the table without the unknown keys
    t2 = tmp_path / "known.csv"
    t2.write_text("key,weight\n1,2.0\n4,1.0\n")
    assert _rank(store, tmp_path / "r2", "--teleport", str(t2), "-q") == 0
    assert (tmp_path / "r" / "scores.npy").read_bytes() == (
        tmp_path / "r2" / "scores.npy"
    ).read_bytes()


@pytest.mark.parametrize(
    "text, words",
    [
        ("key,weight\n1,0\n2,0.0\n", "sum to zero"),
        ("key,weight\n1,1.0\n2,-0.5\n", "negative"),
        ("key,weight\n1,1.0\n2,nan\n", "NaN"),
        ("key,weight\n1,1.0\n2,inf\n", "infinite"),
        ("key,weight\n901,1.0\n", "not nodes"),
    ],
)
def test_bad_teleport_weights(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], text: str, words: str
) -> None:
    t = _teleport_csv(tmp_path, text)
    assert _rank(store, tmp_path / "r", "--teleport", str(t)) == 2
    err = _err(capsys)
    assert "error:" in err and words in err and "hint:" in err
    assert not (tmp_path / "r").exists()


def test_only_unknown_keys_even_when_ignored(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    t = _teleport_csv(tmp_path, "key,weight\n901,1.0\n")
    assert _rank(store, tmp_path / "r", "--teleport", str(t), "--ignore-unknown-keys") == 2
    assert "sum to zero" in _err(capsys)


def test_empty_teleport_table(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    t = tmp_path / "empty.parquet"
    pq.write_table(
        pa.table({"key": pa.array([], pa.int64()), "weight": pa.array([], pa.float64())}), t
    )
    assert _rank(store, tmp_path / "r", "--teleport", str(t)) == 2
    err = _err(capsys)
    assert "empty" in err and "hint:" in err
    assert not (tmp_path / "r").exists()


def test_header_only_teleport_csv(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # DuckDB reads it as two text columns and no rows: the error says "empty" (it said the key
    # type was wrong before the fix)
    t = _teleport_csv(tmp_path, "key,weight\n")
    assert _rank(store, tmp_path / "r", "--teleport", str(t)) == 2
    err = _err(capsys)
    assert "error:" in err and "is empty" in err and "hint:" in err
    assert not (tmp_path / "r").exists()


def test_teleport_keys_of_another_type(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    t = _teleport_csv(tmp_path, "key,weight\nhost-a.example,1.0\n")
    assert _rank(store, tmp_path / "r", "--teleport", str(t)) == 2
    assert "keys are" in _err(capsys)


def _damaged_copy(store: Path, tmp_path: Path) -> Path:
    import shutil

    copy = tmp_path / "store"
    shutil.copytree(store, copy)
    return copy


def test_damaged_shard_is_refused_with_exit_4(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    copy = _damaged_copy(store, tmp_path)
    shard = sorted((copy / "shards").rglob("*.npy"))[-1]
    data = bytearray(shard.read_bytes())
    data[-1] ^= 0x01  # one bit of one source id
    shard.write_bytes(bytes(data))
    assert _rank(copy, tmp_path / "r") == 4
    err = _err(capsys)
    assert "error:" in err and shard.name in err and "hint:" in err
    assert not (tmp_path / "r").exists()


def test_truncated_shard_is_refused_with_exit_4(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    copy = _damaged_copy(store, tmp_path)
    shard = sorted((copy / "shards").rglob("*.npy"))[0]
    shard.write_bytes(shard.read_bytes()[:-8])
    assert _rank(copy, tmp_path / "r") == 4
    assert "error:" in _err(capsys)


def test_damaged_manifest_is_refused_with_exit_4(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    copy = _damaged_copy(store, tmp_path)
    m = copy / "manifest.json"
    m.write_text(m.read_text()[:-20])
    assert _rank(copy, tmp_path / "r") == 4
    assert "error:" in _err(capsys)


def test_max_iter_reached_is_exit_3_with_a_saved_run(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert _rank(store, tmp_path / "r", "--max-iter", "3", "--tol", "1e-14") == 3
    err = _err(capsys)
    assert "not converged" in err and "hint:" in err and "--init" in err
    doc = json.loads((tmp_path / "r" / "run.json").read_text())
    assert (
        doc["converged"] is False and doc["status"] == "not-converged" and doc["exit_status"] == 3
    )
    assert (
        doc["iterations"] == 3 and math.isfinite(doc["error_bound"]) and doc["error_bound"] > 1e-14
    )
    scores = np.load(tmp_path / "r" / "scores.npy")
    assert abs(scores.sum() - 1.0) <= 1e-12 and (tmp_path / "r" / "scores.parquet").is_file()


def test_a_tol_below_float64_precision_runs_to_max_iter(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert _rank(store, tmp_path / "r", "--max-iter", "200", "--tol", "1e-300", "-q") == 3
    doc = json.loads((tmp_path / "r" / "run.json").read_text())
    assert (
        doc["iterations"] == 200
        and math.isfinite(doc["error_bound"])
        and doc["error_bound"] < 1e-13
    )


def test_an_existing_run_is_not_overwritten(
    store: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert _rank(store, tmp_path / "r", "-q") == 0
    before = (tmp_path / "r" / "run.json").read_bytes()
    assert _rank(store, tmp_path / "r", "--damping", "0.5") == 2
    assert "--overwrite" in _err(capsys)
    assert (tmp_path / "r" / "run.json").read_bytes() == before
