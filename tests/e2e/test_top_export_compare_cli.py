"""`shardrank top | export | compare | report` through the CLI, in process and as a subprocess."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank.cli.main import main


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """Two runs of one invented citation graph: uniform and seeded teleport."""
    d = tmp_path_factory.mktemp("cli")
    lines = ["src,dst"]
    for i in range(40):
        lines += [
            f"paper-{i:02d},paper-{(i * 7 + 3) % 40:02d}",
            f"paper-{i:02d},paper-{(i * 3 + 1) % 40:02d}",
        ]
    lines += ["=cmd|' /C calc'!A0,paper-00", "paper-05,=cmd|' /C calc'!A0"]  # a hostile key
    (d / "cites.csv").write_text("\n".join(lines) + "\n")
    (d / "seeds.csv").write_text("key,weight\npaper-01,1\n")
    assert main(["build", str(d / "cites.csv"), "--out", str(d / "s"), "-q"]) == 0
    assert main(["rank", str(d / "s"), "--out", str(d / "a.run"), "-q"]) == 0
    assert (
        main(
            [
                "rank",
                str(d / "s"),
                "--out",
                str(d / "b.run"),
                "--teleport",
                str(d / "seeds.csv"),
                "-q",
            ]
        )
        == 0
    )
    return d / "a.run", d / "b.run"


def test_top_text_json_csv(runs: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    a, _ = runs
    assert main(["top", str(a), "-k", "5"]) == 0
    text = capsys.readouterr().out
    assert text.splitlines()[0].split() == ["#", "score", "x", "N", "in", "out", "key"]
    assert len(text.splitlines()) == 6
    assert main(["top", str(a), "-k", "5", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["position"] for r in rows] == [1, 2, 3, 4, 5]
    assert {"position", "key", "score", "score_x_n", "in_degree", "out_degree"} <= set(rows[0])
    assert rows == sorted(rows, key=lambda r: (-r["score"], r["key"]))
    assert main(["top", str(a), "-k", "50", "--csv", "--match", "=cmd"]) == 0
    got = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert [r["key"] for r in got] == ["'=cmd|' /C calc'!A0"]


def test_top_json_and_csv_are_exclusive(runs: tuple[Path, Path]) -> None:
    with pytest.raises(SystemExit) as e:
        main(["top", str(runs[0]), "--json", "--csv"])
    assert e.value.code == 2


def test_export_then_compare(
    runs: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    a, b = runs
    out = tmp_path / "a.parquet"
    assert main(["export", str(a), "--out", str(out)]) == 0
    assert "41 rows (parquet)" in capsys.readouterr().out
    t = pq.read_table(out)
    assert t.column_names == ["position", "key", "score", "in_degree", "out_degree"]
    res = shardrank.open_run(a)
    assert dict(
        zip(t.column("key").to_pylist(), t.column("score").to_pylist(), strict=True)
    ) == dict(zip(res.keys.to_pylist(), res.scores.tolist(), strict=True))
    assert main(["export", str(a), "--out", str(out)]) == 2  # exists
    assert "--overwrite" in capsys.readouterr().err
    assert main(["compare", str(a), str(b), "-k", "10", "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert set(s["overlap"]) == {"10", "100", "1000"}
    assert 0 < s["l1"] <= 2 and s["new_keys"] == s["vanished_keys"] == 0
    assert main(["compare", str(a), str(b)]) == 0
    text = capsys.readouterr().out
    assert "L1 distance" in text and "Kendall tau" in text


def test_report_cli_and_missing_run(
    runs: tuple[Path, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    a, b = runs
    out = tmp_path / "r.html"
    assert main(["report", str(b), "--out", str(out), "--against", str(a), "-q"]) == 0
    assert out.is_file() and "Against the baseline" in out.read_text()
    assert main(["top", str(tmp_path / "nope.run")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error:") and "hint:" in err


def test_subprocess_top(runs: tuple[Path, Path]) -> None:
    exe = Path(sys.executable).with_name("shardrank")  # the console script next to this Python
    cmd = (
        [str(exe)]
        if exe.exists()
        else [sys.executable, "-c", "from shardrank.cli.main import entry; entry()"]
    )
    p = subprocess.run(
        [*cmd, "top", str(runs[0]), "-k", "2", "--json"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert p.returncode == 0, p.stderr
    assert len(json.loads(p.stdout)) == 2
