"""top_rows and positions: order, ties by key, --match patterns, degrees from the store."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import networkx as nx
import numpy as np
import pytest

import shardrank
from shardrank.errors import BadInputError
from shardrank.results.compare import positions, positions_of, top_ids
from shardrank.results.top import top_rows

SRC = [
    "https://a.example/",
    "https://a.example/x",
    "https://b.example/",
    "https://c.example/",
    "https://c.example/",
    "https://d.example/y",
    "https://a.example/x",
]
DST = [
    "https://b.example/",
    "https://b.example/",
    "https://a.example/",
    "https://a.example/",
    "https://b.example/",
    "https://a.example/",
    "https://b.example/",
]  # last row duplicates row 2


@pytest.fixture
def run(build: Any, tmp_path: Path) -> Path:
    store = build(SRC, DST)
    shardrank.rank(store, tmp_path / "r.run")
    return tmp_path / "r.run"


def test_positions_ties_by_id() -> None:
    s = np.array([0.1, 0.3, 0.1, 0.3, 0.2])
    # by hand: 0.3 (ids 1, 3) -> positions 1, 2; 0.2 (id 4) -> 3; 0.1 (ids 0, 2) -> 4, 5
    assert positions(s).tolist() == [4, 1, 5, 2, 3]
    assert positions_of(s, np.array([2, 3])).tolist() == [5, 2]


@pytest.mark.parametrize("seed", range(5))
def test_positions_of_and_top_ids_agree_with_a_full_sort(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(50, 5000))
    s = rng.integers(0, 20, n).astype(float)  # many ties, also across the top-k boundary
    full = positions(s)
    # the full sort is the plain definition: sorted by (-score, id)
    assert full.tolist() == (np.argsort(np.lexsort((np.arange(n), -s))) + 1).tolist()
    ids = rng.choice(n, min(n, 200), replace=False)
    assert positions_of(s, ids).tolist() == full[ids].tolist()
    for k in (1, 7, n // 3, n):
        assert top_ids(s, k).tolist() == np.argsort(full)[:k].tolist()


def test_top_rows_order_scores_and_degrees(run: Path) -> None:
    res = shardrank.open_run(run)
    rows = top_rows(run, k=100)
    assert len(rows) == res.n_nodes == 5
    assert [r["position"] for r in rows] == list(range(1, 6))
    want = sorted(
        zip(res.keys.to_pylist(), res.scores.tolist(), strict=True), key=lambda t: (-t[1], t[0])
    )
    assert [(r["key"], r["score"]) for r in rows] == want
    # degrees from networkx on the same edge list (a DiGraph merges the duplicate edge)
    g = nx.DiGraph(zip(SRC, DST, strict=True))
    for r in rows:
        assert (r["in_degree"], r["out_degree"]) == (g.in_degree(r["key"]), g.out_degree(r["key"]))
        assert r["score_x_n"] == pytest.approx(r["score"] * 5)


def test_match_glob_and_substring(run: Path) -> None:
    full = {r["key"]: r["position"] for r in top_rows(run, k=10)}
    rows = top_rows(run, k=10, match="https://a.example/*")
    assert {r["key"] for r in rows} == {"https://a.example/", "https://a.example/x"}
    assert all(r["position"] == full[r["key"]] for r in rows)  # positions in the whole run
    assert [r["key"] for r in top_rows(run, k=10, match="/y")] == [
        "https://d.example/y"
    ]  # substring
    assert top_rows(run, k=1, match="example")[0]["position"] == 1
    assert top_rows(run, k=5, match="nothing-like-this") == []
    assert "in_degree" not in top_rows(run, k=2, degrees=False)[0]


def test_moved_store_needs_store_option(run: Path, tmp_path: Path) -> None:
    res = shardrank.open_run(run)
    store = Path(res.summary["store"]["path"])
    moved = tmp_path / "moved.store"
    store.rename(moved)
    with pytest.raises(BadInputError, match="not there"):
        top_rows(run, k=3)
    assert top_rows(run, k=3, store=moved)[0]["in_degree"] >= 1
    with pytest.raises(BadInputError):
        top_rows(run, k=0)
