"""The CLI in process: build, inspect, verify, rank on a tiny CSV."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from shardrank.cli.main import main


def test_build_inspect_verify_rank(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "links.csv"
    f.write_text("# an invented citation list\nsrc,dst\npaper-a,paper-b\npaper-b,paper-c\npaper-c,paper-a\npaper-c,paper-d\n")
    store, run = tmp_path / "s", tmp_path / "r"
    assert main(["build", str(f), "--out", str(store), "-q"]) == 0
    assert main(["inspect", str(store), "--json"]) == 0
    facts = json.loads(capsys.readouterr().out)
    assert (facts["nodes"], facts["edges"], facts["dead_ends"]) == (4, 4, 1)
    assert main(["verify", str(store), "-q"]) == 0
    assert main(["rank", str(store), "--out", str(run), "-q"]) == 0
    doc = json.loads((run / "run.json").read_text())
    assert doc["converged"] and doc["error_bound"] <= 1e-9


def test_missing_file_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["build", str(tmp_path / "nope.parquet"), "--out", str(tmp_path / "s")]) == 2
    err = capsys.readouterr().err
    assert "error:" in err and "no such file" in err
    assert not (tmp_path / "s").exists()


def test_bad_damping_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "e.csv"
    f.write_text("1,2\n2,1\n")
    assert main(["build", str(f), "--out", str(tmp_path / "s"), "-q"]) == 0
    for d in ("0", "1", "1.5", "nan"):
        assert main(["rank", str(tmp_path / "s"), "--out", str(tmp_path / "r"), "--damping", d]) == 2
        assert "0 < d < 1" in capsys.readouterr().err
