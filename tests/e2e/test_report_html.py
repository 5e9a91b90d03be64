"""The HTML report: hostile keys are escaped, nothing loads from the network, and it renders.

The rendering check starts Debian's headless Chromium on the file, fails on any console
message (script errors and Content-Security-Policy violations are reported there), and counts
the plot colours in a screenshot so a blank or broken page cannot pass.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import shardrank
from shardrank.report import palette, write_report

SCRIPT_KEY = "<script>alert(1)</script>"
NEWLINE_KEY = "https://odd.example/a\nb"
QUOTE_KEY = 'https://odd.example/"onmouseover="x'


@pytest.fixture(scope="module")
def report_pair(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """A graph whose most-linked nodes have hostile keys; reports with and without --against."""
    d = tmp_path_factory.mktemp("report")
    rng = np.random.default_rng(5)
    pages = [f"https://site{i}.example/" for i in range(80)]
    src, dst = [], []
    for p in pages:  # everyone links to the hostile keys, plus a few random links
        src += [p, p, p]
        dst += [SCRIPT_KEY, NEWLINE_KEY, pages[int(rng.integers(0, 80))]]
    src += [SCRIPT_KEY, NEWLINE_KEY, QUOTE_KEY]
    dst += [pages[0], QUOTE_KEY, pages[1]]
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table({"src": src, "dst": dst}), d / "edges.parquet")
    shardrank.build_store([d / "edges.parquet"], d / "s")
    (d / "seeds.csv").write_text("key,weight\nhttps://site3.example/,1\n")
    shardrank.rank(d / "s", d / "a.run")
    shardrank.rank(d / "s", d / "b.run", shardrank.RankOptions(teleport=str(d / "seeds.csv")))
    plain = write_report(d / "a.run", d / "plain.html")
    both = write_report(d / "b.run", d / "both.html", against=d / "a.run", compare_k=50)
    return plain, both


def test_keys_are_escaped(report_pair: tuple[Path, Path]) -> None:
    for f in report_pair:
        html = f.read_text(encoding="utf-8")
        assert "<script" not in html.lower()  # no script element at all, hostile or ours
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html  # shown as text
        assert "https://odd.example/a\\nb" in html  # the newline shown as \n
        assert NEWLINE_KEY not in html
        assert "&quot;onmouseover=&quot;x" in html and 'onmouseover="' not in html
        assert not re.search(r"\son[a-z]+\s*=", html)  # no event handler attributes anywhere


def test_self_contained(report_pair: tuple[Path, Path]) -> None:
    for f in report_pair:
        html = f.read_text(encoding="utf-8")
        assert "Content-Security-Policy" in html and "default-src 'none'" in html
        # the only URLs are XML namespace names inside the inline SVG, which are never fetched
        urls = set(re.findall(r"https?://[^\s\"'<>)]+", html)) - {
            "http://www.w3.org/2000/svg",
            "http://www.w3.org/1999/xlink",
            "http://purl.org/dc/elements/1.1/",
            "http://creativecommons.org/ns#",
            "http://www.w3.org/1999/02/22-rdf-syntax-ns#",
        }
        assert {u for u in urls if ".example" not in u} == set()  # keys are text, not links
        assert not re.search(r"<(link|img|iframe|object|embed)\b", html)
        assert html.count("<svg") == (2 if f.name == "plain.html" else 3)
    both = report_pair[1].read_text(encoding="utf-8")
    for title in (
        "The graph",
        "Run options",
        "Convergence",
        "Score distribution",
        "Top 25",
        "Against the baseline",
        "Biggest risers",
        "Biggest fallers",
    ):
        assert title in both


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        if shutil.which(name):
            return shutil.which(name)
    return None


def _render(html: Path, tmp: Path, width: int, height: int) -> tuple[np.ndarray, str]:
    exe = _chromium()
    if exe is None:
        pytest.skip(
            "Debian's chromium is not installed (apt-get install chromium); .ci/run installs it"
        )
    shot = tmp / f"{html.stem}-{width}.png"
    p = subprocess.run(
        [
            exe,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            f"--user-data-dir={tmp / 'profile'}",
            "--hide-scrollbars",
            "--enable-logging=stderr",
            "--v=0",
            f"--screenshot={shot}",
            f"--window-size={width},{height}",
            html.resolve().as_uri(),
        ],
        capture_output=True,
        text=True,
        timeout=90,
    )
    assert shot.is_file(), p.stderr[-2000:]
    import matplotlib.image

    return matplotlib.image.imread(str(shot))[..., :3], p.stderr


def _pixels_of(img: np.ndarray, hex_colour: str, tol: float = 0.12) -> int:
    """How many pixels are within ``tol`` (per channel, 0..1) of a colour."""
    rgb = np.array([int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])
    return int(np.count_nonzero(np.all(np.abs(img - rgb) < tol, axis=-1)))


# Injected into a copy of the report: all text and borders become transparent, so whatever
# still shows the plot colours is drawn by the inline SVG (which colours itself with fill and
# stroke, not with CSS color).
_HIDE_TEXT = (
    "<style>body *{color:transparent!important;border-color:transparent!important}</style></head>"
)


def _rgb(hex_colour: str) -> np.ndarray:
    return np.array([int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])


def test_renders_in_headless_chromium(report_pair: tuple[Path, Path], tmp_path: Path) -> None:
    both = report_pair[1]
    img, log = _render(both, tmp_path, 1100, 5200)
    console = [line for line in log.splitlines() if "CONSOLE" in line]
    assert console == [], console  # no script errors, no blocked loads
    not_background = np.mean(np.any(np.abs(img - _rgb(palette.PAPER)) > 0.05, axis=-1))
    assert not_background > 0.05  # something is drawn
    # the plots themselves are visible: same page, text hidden
    bare = tmp_path / "bare.html"
    bare.write_text(
        both.read_text(encoding="utf-8").replace("</head>", _HIDE_TEXT, 1), encoding="utf-8"
    )
    img, _ = _render(bare, tmp_path, 1100, 5200)
    assert _pixels_of(img, palette.LINE_A) > 1000  # lines of the run (and of run A)
    assert _pixels_of(img, palette.LINE_B) > 200  # error-bound markers, run B's distribution
    rows = np.flatnonzero(np.all(np.abs(img - _rgb(palette.LINE_A)) < 0.12, axis=-1).any(axis=1))
    bands = np.count_nonzero(np.diff(rows) > 40) + 1 if rows.size else 0
    assert bands >= 3  # convergence, distribution and rank scatter, one below the other


def test_renders_on_a_phone_width(report_pair: tuple[Path, Path], tmp_path: Path) -> None:
    img, log = _render(report_pair[0], tmp_path, 390, 2400)
    assert [line for line in log.splitlines() if "CONSOLE" in line] == []
    assert _pixels_of(img, palette.LINE_A) > 300


def test_report_without_its_store(build: Any, tmp_path: Path) -> None:
    # nightly rotation may delete old stores; the report of an old run must still be written
    store = build(["p", "q", "r"], ["q", "r", "p"])
    shardrank.rank(store, tmp_path / "old.run")
    shutil.rmtree(store)
    html = write_report(tmp_path / "old.run", tmp_path / "old.html").read_text(encoding="utf-8")
    assert "Graph facts and degrees are left out" in html and "Top 3" in html
