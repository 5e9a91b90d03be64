"""`shardrank refresh` in process: warm start, reuse, guards, bad snapshots, pruning.

The graphs are invented: random sources and heavy-tailed (Pareto) destinations, a shape
common practice uses for link graphs; the second snapshot changes 1% of the edges, some of
them to pages that did not exist before (so node ids shift and the warm start must go by key).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions, RankOptions, RefreshOptions
from shardrank.cli.main import main
from shardrank.refresh.checks import validate_run
from shardrank.refresh.fingerprint import input_fingerprint

N, M = 5000, 50000


def snapshot(path: Path, churn: float = 0.0, seed: int = 7, rechurn: int = 0) -> Path:
    """Write one night's edge table; ``churn`` of the edges get a new destination."""
    rng = np.random.default_rng(seed)
    src = rng.integers(0, N, M)
    dst = (rng.pareto(1.2, M) * 20).astype(np.int64) % N
    if churn:
        r2 = np.random.default_rng(seed + 1 + rechurn)
        k = int(M * churn)
        idx = r2.choice(M, k, replace=False)
        dst[idx] = r2.integers(0, N + N // 100, k)  # some links to brand-new pages
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.table({"src": src, "dst": dst}), path)
    return path


def refresh_cli(
    capsys: pytest.CaptureFixture[str], edges: Path, home: Path, *extra: str
) -> tuple[int, dict, str]:
    code = main(["refresh", "--edges", str(edges), "--home", str(home), "-q", *extra])
    out, err = capsys.readouterr()
    lines = [ln for ln in out.splitlines() if ln.strip()]
    summary = json.loads(lines[-1]) if lines else {}
    assert len(lines) <= 1, "refresh prints exactly one summary line on stdout"
    return code, summary, err


def current(home: Path) -> Path:
    return (home / "current").resolve()


def test_second_refresh_warm_starts_and_beats_a_cold_rank(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    home = tmp_path / "home"
    code, s1, _ = refresh_cli(capsys, snapshot(tmp_path / "n1/e.parquet"), home)
    assert code == 0 and s1["refresh"] == "published" and s1["iterations"]["start"] == "cold"
    assert current(home) == (home / "runs/gen-000001").resolve()
    code, s2, _ = refresh_cli(capsys, snapshot(tmp_path / "n2/e.parquet", churn=0.01), home)
    assert code == 0 and s2["published"] and s2["iterations"]["start"] == "warm"
    run2 = current(home)
    assert run2 == (home / "runs/gen-000002").resolve()
    assert json.loads((run2 / "refresh.json").read_text()) == s2  # the summary is also in the run
    doc = json.loads((run2 / "run.json").read_text())
    assert doc["init"]["kind"] == "warm" and doc["init"]["new_nodes"] > 0  # matched by key
    # the same graph ranked cold, outside the refresh
    cold = shardrank.rank(home / s2["store"], tmp_path / "cold", RankOptions())
    warm_iters, cold_iters = s2["iterations"]["count"], cold.iterations
    print(
        f"warm {warm_iters} vs cold {cold_iters} iterations (ratio {warm_iters / cold_iters:.2f}); "
        f"cold estimate {s2['iterations']['cold_estimate']}"
    )
    assert warm_iters < cold_iters
    # both within tol of the answer, so within 2 tol of each other (triangle inequality)
    warm = shardrank.open_run(run2)
    assert float(np.abs(np.asarray(warm.scores) - cold.scores).sum()) <= 2 * 1e-9
    # summary: phases, bound, comparison with the previous run
    assert {
        "lock",
        "fingerprint",
        "build",
        "rank",
        "validate",
        "compare",
        "publish",
        "prune",
        "total",
    } <= set(s2["seconds"])
    assert s2["error_bound"] <= s2["tol"] == 1e-9
    assert 0 < s2["previous"]["l1"] < 0.2 and s2["previous"]["new_keys"] > 0
    assert s2["previous"]["run"] == "runs/gen-000001"
    assert s2["iterations"]["last_cold"]["generation"] == 1


def test_unchanged_snapshot_is_up_to_date_and_new_options_reuse_the_store(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    home = tmp_path / "home"
    edges = snapshot(tmp_path / "e.parquet")
    assert refresh_cli(capsys, edges, home)[0] == 0
    code, s, _ = refresh_cli(capsys, edges, home)
    assert code == 0 and s["refresh"] == "up-to-date" and s["generation"] == 1
    assert not (home / "runs/gen-000002").exists()
    code, s, _ = refresh_cli(capsys, edges, home, "--damping", "0.8")
    assert code == 0 and s["refresh"] == "published" and s["store_reused"]
    assert s["store"] == "stores/gen-000001" and s["run"] == "runs/gen-000002"
    assert not (home / "stores/gen-000002").exists()


@pytest.mark.parametrize("kind", ["parquet", "csv"])
def test_fingerprint_before_the_build_matches_the_store(tmp_path: Path, kind: str) -> None:
    """refresh decides reuse from a fingerprint it computes before building; it must be the one
    the build records, or a store would never be reused (or worse, reused wrongly)."""
    if kind == "parquet":
        edges = [snapshot(tmp_path / "e.parquet")]
        o = BuildOptions()
    else:
        f = tmp_path / "e.csv"
        f.write_text("from,to\nhome.example,docs.example\ndocs.example,home.example\n")
        edges, o = [f], BuildOptions(src="from", dst="to")
    m = shardrank.build_store(edges, tmp_path / "s", o)
    assert input_fingerprint(edges, o).fingerprint == m.input["fingerprint"]


def test_guard_failure_keeps_the_run_unpublished_then_looser_guards_publish_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    home = tmp_path / "home"
    assert refresh_cli(capsys, snapshot(tmp_path / "n1/e.parquet"), home)[0] == 0
    before = current(home)
    night2 = snapshot(tmp_path / "n2/e.parquet", churn=0.01)
    code, s, err = refresh_cli(capsys, night2, home, "--max-l1", "1e-6", "--min-overlap", "10:1")
    assert code == 5 and not s["published"] and s["refresh"] == "rejected"
    assert "L1 distance" in err and "--max-l1" in err
    assert any("--max-l1" in r for r in s["reasons"])
    assert s["guards"]["max_l1"]["ok"] is False
    assert current(home) == before  # untouched
    assert (home / "runs/gen-000002/scores.parquet").is_file()  # kept
    # the operator looks, accepts it: the kept run is published without being recomputed
    code, s, _ = refresh_cli(capsys, night2, home, "--max-l1", "0.5")
    assert code == 0 and s["published"] and s["resumed"] == {"phase": "publish"}
    assert "rank" not in s["seconds"] and "build" not in s["seconds"]
    assert current(home) == (home / "runs/gen-000002").resolve()


def test_bad_guard_syntax_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err = refresh_cli(
        capsys, snapshot(tmp_path / "e.parquet"), tmp_path / "h", "--min-overlap", "ten"
    )
    assert code == 2 and "K:F" in err


def _corrupt(tmp_path: Path, how: str) -> Path:
    d = tmp_path / f"bad-{how}"
    d.mkdir()
    good = snapshot(tmp_path / "good.parquet", churn=0.01)
    if how == "truncated":  # a copy cut short: the Parquet footer is gone
        data = good.read_bytes()
        (d / "part-0.parquet").write_bytes(data[: len(data) // 2])
    elif how == "garbage":
        (d / "part-0.parquet").write_bytes(os.urandom(4096))
    elif how == "missing-column":  # schema broken: the destination column was renamed
        pq.write_table(pa.table({"src": [1, 2], "target": [2, 3]}), d / "part-0.parquet")
    elif how == "mixed-key-types":  # one part has string keys, another integer keys
        pq.write_table(pa.table({"src": [1, 2], "dst": [2, 3]}), d / "part-0.parquet")
        pq.write_table(pa.table({"src": ["a.example"], "dst": ["b.example"]}), d / "part-1.parquet")
    elif how == "other-key-type":  # the whole export switched to string keys overnight
        pq.write_table(
            pa.table({"src": ["a.example", "b.example"], "dst": ["b.example", "c.example"]}),
            d / "part-0.parquet",
        )
    return d


@pytest.mark.parametrize(
    "how", ["truncated", "garbage", "missing-column", "mixed-key-types", "other-key-type"]
)
def test_bad_snapshot_fails_and_leaves_current_alone(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], how: str
) -> None:
    home = tmp_path / "home"
    assert refresh_cli(capsys, snapshot(tmp_path / "n1/e.parquet"), home)[0] == 0
    before = current(home)
    code, s, err = refresh_cli(capsys, _corrupt(tmp_path, how), home)
    assert code != 0 and "error:" in err
    assert s == {}  # no summary: nothing was ranked
    assert current(home) == before
    assert not validate_run(before, json.loads((before / "run.json").read_text())["n_nodes"])[1]
    assert [p.name for p in (home / "runs").iterdir()] == ["gen-000001"]
    assert sorted(p.name for p in (home / "stores").iterdir()) == ["gen-000001"]  # no partial left


def test_pruning_keeps_exactly_keep_generations(tmp_path: Path) -> None:
    home = tmp_path / "home"
    o = RefreshOptions(keep=3)
    pruned: list[str] = []
    for night in range(5):
        s = shardrank.refresh(
            [snapshot(tmp_path / f"n{night}/e.parquet", churn=0.01, rechurn=night)], home, o
        )
        pruned += s["pruned"]
    runs = sorted(p.name for p in (home / "runs").iterdir())
    stores = sorted(p.name for p in (home / "stores").iterdir())
    assert runs == stores == ["gen-000003", "gen-000004", "gen-000005"]
    assert current(home) == (home / "runs/gen-000005").resolve()
    assert sorted(pruned) == [
        "runs/gen-000001",
        "runs/gen-000002",
        "stores/gen-000001",
        "stores/gen-000002",
    ]


def test_pruning_never_removes_the_published_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Rejected generations pile up while the published one is older than the window."""
    home = tmp_path / "home"
    assert refresh_cli(capsys, snapshot(tmp_path / "n0/e.parquet"), home)[0] == 0
    for night in range(1, 4):
        edges = snapshot(tmp_path / f"n{night}/e.parquet", churn=0.01, rechurn=night)
        assert refresh_cli(capsys, edges, home, "--keep", "2", "--max-l1", "1e-9")[0] == 5
    assert current(home) == (home / "runs/gen-000001").resolve()
    assert sorted(p.name for p in (home / "runs").iterdir()) == [
        "gen-000001",
        "gen-000003",
        "gen-000004",
    ]
    assert sorted(p.name for p in (home / "stores").iterdir()) == [
        "gen-000001",
        "gen-000003",
        "gen-000004",
    ]


def test_warm_start_fast_path_matches_the_join(tmp_path: Path) -> None:
    """The warm start of a refresh reads the published run by integer key with a searchsorted
    (solve/tables.py); it must give exactly what the DuckDB join gives."""
    from shardrank.solve import tables
    from shardrank.store.reader import StoreReader

    s1 = shardrank.build_store([snapshot(tmp_path / "n1/e.parquet")], tmp_path / "s1")
    assert s1.n_nodes == N
    shardrank.rank(tmp_path / "s1", tmp_path / "r1")
    # night 2 has new pages, and loses pages 4900..4949 (every edge touching them is dropped)
    t = pq.read_table(snapshot(tmp_path / "n2/e.parquet", churn=0.01))
    gone = pa.array(range(4900, 4950))
    t = t.filter(pc.invert(pc.or_(pc.is_in(t["src"], gone), pc.is_in(t["dst"], gone))))
    pq.write_table(t, tmp_path / "n2/e.parquet")
    shardrank.build_store([tmp_path / "n2/e.parquet"], tmp_path / "s2")
    reader = StoreReader.open(tmp_path / "s2")
    fast = tables._init_from_int_run(reader, str(tmp_path / "r1"))
    assert fast is not None
    join = tables._join(reader, str(tmp_path / "r1"), ("score",), "warm-start", True)
    assert np.array_equal(fast[0], join[0]) and np.array_equal(fast[1], join[1])
    assert fast[2] == join[2] > 0  # and some of last night's keys are gone
    assert fast[0].size < reader.n_nodes  # some keys are new tonight
