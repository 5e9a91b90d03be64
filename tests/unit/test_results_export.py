"""export_run: the file equals the in-memory result; CSV keys cannot become formulas."""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank.errors import BadInputError
from shardrank.results.export import FORMULA_STARTS, export_run, spreadsheet_safe

# Keys a crawl can really contain. The first five would run as formulas in a spreadsheet
# (OWASP "CSV Injection" lists = + - @ tab and carriage return as the dangerous first characters).
TRICKY = [
    '=HYPERLINK("http://evil.example")',
    "+1+1",
    "-2+3",
    "@SUM(A1)",
    "\tcell",
    "\rcell",
    "'quoted",
    "plain,with comma",
    "line\nbreak",
    "<script>alert(1)</script>",
    "ünïcode",
]


@pytest.fixture
def run(build: Any, tmp_path: Path) -> tuple[Path, Path]:
    rng = np.random.default_rng(11)
    keys = TRICKY + [f"https://site{i}.example/" for i in range(60)]
    src = [keys[i] for i in rng.integers(0, len(keys), 400)]
    dst = [keys[i] for i in rng.integers(0, len(keys), 400)]
    store = build(src, dst)
    shardrank.rank(store, tmp_path / "r.run")
    return tmp_path / "r.run", store


def _expected(run: Path, store: Path) -> list[dict[str, Any]]:
    """What the export must hold, from the in-memory result and the store, sorted independently."""
    res = shardrank.open_run(run)
    reader = shardrank.open_store(store)
    keys, scores = res.keys.to_pylist(), res.scores.tolist()
    ind, outd = reader.in_degree().tolist(), reader.out_degree().tolist()
    order = sorted(range(len(keys)), key=lambda i: (-scores[i], keys[i]))
    return [
        {
            "position": p,
            "key": keys[i],
            "score": scores[i],
            "in_degree": ind[i],
            "out_degree": outd[i],
        }
        for p, i in enumerate(order, 1)
    ]


def test_parquet_equals_the_result(run: tuple[Path, Path], tmp_path: Path) -> None:
    out = tmp_path / "scores.parquet"
    info = export_run(run[0], out)
    assert info == {
        "path": str(out),
        "format": "parquet",
        "rows": len(TRICKY) + 60,
        "escaped_keys": 0,
    }
    got = pq.read_table(out).to_pylist()
    assert got == _expected(*run)  # exact: keys untouched, scores bit for bit
    # the documented DuckDB query works on the file as written
    top = duckdb.sql(f"SELECT key, position FROM '{out}' ORDER BY position LIMIT 3").fetchall()
    assert [p for _, p in top] == [1, 2, 3]
    assert not list(tmp_path.glob("*.partial"))


@pytest.mark.parametrize("name", ["scores.csv", "scores.csv.gz"])
def test_csv_is_spreadsheet_safe_and_reversible(
    run: tuple[Path, Path], tmp_path: Path, name: str
) -> None:
    out = tmp_path / name
    info = export_run(run[0], out)
    assert info["escaped_keys"] == 7  # the six formula starts and the apostrophe
    rows = duckdb.sql(
        f"SELECT * FROM read_csv('{out}', header=true, quote='\"', all_varchar=true) "
        "ORDER BY position::BIGINT"
    ).fetchall()
    want = _expected(*run)
    assert len(rows) == len(want)
    for (pos, key, score, ind, outd), w in zip(rows, want, strict=True):
        assert not key.startswith(FORMULA_STARTS)  # nothing a spreadsheet would run
        original = key[1:] if key.startswith("'") else key  # the documented way back
        assert original == w["key"]
        assert (int(pos), float(score), int(ind), int(outd)) == (
            w["position"],
            w["score"],
            w["in_degree"],
            w["out_degree"],
        )


def test_csv_quotes_every_key_so_newlines_and_commas_survive(
    run: tuple[Path, Path], tmp_path: Path
) -> None:
    out = tmp_path / "s.csv"
    export_run(run[0], out)
    rows = list(csv.DictReader(io.StringIO(out.read_text(encoding="utf-8"), newline="")))
    keys = {r["key"] for r in rows}
    assert (
        "line\nbreak" in keys
        and "plain,with comma" in keys
        and '\'=HYPERLINK("http://evil.example")' in keys
    )


def test_spreadsheet_safe() -> None:
    assert spreadsheet_safe("=1+1") == "'=1+1"
    assert spreadsheet_safe("'a") == "''a"
    assert spreadsheet_safe("a=1") == "a=1"
    assert spreadsheet_safe(-5) == -5  # integer keys are numbers, not formulas


def test_integer_keys_are_not_escaped(build: Any, tmp_path: Path) -> None:
    store = build([-3, -2, 5, 7], [5, 7, -3, -2])
    shardrank.rank(store, tmp_path / "i.run")
    info = export_run(tmp_path / "i.run", tmp_path / "i.csv")
    assert info["escaped_keys"] == 0
    keys = sorted(int(r["key"]) for r in csv.DictReader(open(tmp_path / "i.csv", newline="")))
    assert keys == [-3, -2, 5, 7]


def test_refuses_unknown_suffix_and_existing_file(run: tuple[Path, Path], tmp_path: Path) -> None:
    with pytest.raises(BadInputError, match="format"):
        export_run(run[0], tmp_path / "scores.xlsx")
    out = tmp_path / "s.parquet"
    export_run(run[0], out)
    with pytest.raises(BadInputError, match="exists"):
        export_run(run[0], out)
    export_run(run[0], out, overwrite=True)
