"""`shardrank demo` end to end at its small size: every step runs and the story holds."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

import shardrank
from shardrank.cli.main import main
from shardrank.results.top import top_rows


def test_demo_small(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    d = tmp_path / "demo"
    assert main(["demo", "--dir", str(d), "--size", "small"]) == 0
    out = capsys.readouterr().out
    for f in (
        "edges.parquet",
        "trusted-seeds.csv",
        "crawl.store",
        "uniform.run",
        "seeded.run",
        "report.html",
    ):
        assert (d / f).exists(), f
    assert f"Report: {(d / 'report.html').resolve()}" in out
    assert (
        "Top 10 pages, uniform teleport:" in out
        and "Top 10 pages, teleport to the trusted seeds:" in out
    )
    # the story: the link farm lifts its shop into the uniform top 10; trusted seeds demote it
    shop = "https://miracle-gadget-shop.example/"
    uniform = top_rows(d / "uniform.run", 1, match=shop, degrees=False)[0]["position"]
    seeded = top_rows(d / "seeded.run", 1, match=shop, degrees=False)[0]["position"]
    assert uniform <= 10 < 100 < seeded
    m = re.search(r"position ([\d,]+) with a uniform teleport, ([\d,]+) with trusted seeds", out)
    assert m and (int(m[1].replace(",", "")), int(m[2].replace(",", ""))) == (uniform, seeded)
    for run in ("uniform.run", "seeded.run"):
        res = shardrank.open_run(d / run)
        assert res.converged and abs(float(res.scores.sum()) - 1) < 1e-12
    # every invented host is under the reserved .example domain
    assert all(".example/" in r["key"] for r in top_rows(d / "uniform.run", 200, degrees=False))
    # the commands the demo suggests work
    assert main(["top", str(d / "seeded.run"), "-k", "3", "--json"]) == 0
    assert len(json.loads(capsys.readouterr().out)) == 3
