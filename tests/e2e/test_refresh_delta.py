"""`shardrank refresh --add/--remove`: a night's change given as a delta patches the published
store; the result must be what a refresh of the whole new snapshot publishes.

The graphs are invented (random sources, heavy-tailed destinations, as in
test_refresh_cycle.py). The reference for "the same graph" is a full build of the new snapshot
(every .npy file byte-equal), and for the scores the definition of convergence: both runs are
within tol of the exact answer, so within 2 tol of each other.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from shardrank.cli.main import main

N, M = 3000, 30000


def _night(rng: np.random.Generator) -> np.ndarray:
    src = rng.integers(0, N, M)
    dst = (rng.pareto(1.2, M) * 20).astype(np.int64) % N
    return np.unique(np.stack([src, dst], axis=1), axis=0)


def _write(path: Path, pairs: np.ndarray) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.table({"src": pairs[:, 0].astype(np.int64), "dst": pairs[:, 1].astype(np.int64)}), path)
    return path


def _cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, dict, str]:
    code = main(["refresh", *args, "-q"])
    out, err = capsys.readouterr()
    lines = [ln for ln in out.splitlines() if ln.strip()]
    return code, (json.loads(lines[-1]) if lines else {}), err


def _npy_digests(store: Path) -> dict[str, str]:
    return {str(p.relative_to(store)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(store.rglob("*.npy"))}


@pytest.fixture
def nights(tmp_path: Path) -> dict[str, Path]:
    rng = np.random.default_rng(4)
    a = _night(rng)
    keep = rng.uniform(size=len(a)) > 0.02  # 2% of the links disappear ...
    new = np.stack([rng.integers(0, N + 40, 600), rng.integers(0, N + 40, 600)], axis=1)  # ... some to new pages
    b = np.unique(np.concatenate([a[keep], new]), axis=0)
    sa = {tuple(x) for x in a.tolist()}
    sb = {tuple(x) for x in b.tolist()}
    return {
        "a": _write(tmp_path / "a.parquet", a),
        "b": _write(tmp_path / "b.parquet", b),
        "add": _write(tmp_path / "add.parquet", np.array(sorted(sb - sa))),
        "remove": _write(tmp_path / "remove.parquet", np.array(sorted(sa - sb))),
    }


def test_a_delta_refresh_publishes_what_a_snapshot_refresh_does(
    tmp_path: Path, nights: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    home, cold = tmp_path / "home", tmp_path / "cold"
    code, s1, _ = _cli(capsys, "--edges", str(nights["a"]), "--home", str(home))
    assert code == 0 and s1["published"]
    code, s2, err = _cli(capsys, "--add", str(nights["add"]), "--remove", str(nights["remove"]),
                         "--home", str(home))
    assert code == 0, err
    assert s2["published"] and s2["iterations"]["start"] == "warm" and s2["generation"] == 2
    assert "build" in s2["seconds"]
    # refresh computed, before patching, the fingerprint the patch then recorded (resuming an
    # interrupted delta refresh depends on it)
    manifest = json.loads((home / s2["store"] / "manifest.json").read_text())
    assert manifest["input"]["fingerprint"] == s2["input_fingerprint"]
    assert manifest["options"]["build_path"] == "patch"
    code, sc, _ = _cli(capsys, "--edges", str(nights["b"]), "--home", str(cold))
    assert code == 0
    # the same graph: the patched store equals a full build of snapshot B, file for file
    assert _npy_digests(home / s2["store"]) == _npy_digests(cold / sc["store"])
    # the same answer: both within tol (1e-9 by default) of the exact scores
    ra = pq.read_table(home / "current" / "scores.parquet")
    rc = pq.read_table(cold / "current" / "scores.parquet")
    assert ra.column("key").to_pylist() == rc.column("key").to_pylist()
    diff = np.abs(ra.column("score").to_numpy() - rc.column("score").to_numpy()).sum()
    assert diff <= 2e-9
    # the same delta again: nothing to do
    code, s3, _ = _cli(capsys, "--add", str(nights["add"]), "--remove", str(nights["remove"]),
                       "--home", str(home))
    assert code == 0 and s3["refresh"] == "up-to-date" and s3["generation"] == 2


def test_a_delta_needs_a_published_run_and_excludes_a_snapshot(
    tmp_path: Path, nights: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    home = tmp_path / "home"
    code, _, err = _cli(capsys, "--add", str(nights["add"]), "--home", str(home))
    assert code == 2 and "published" in err and "hint:" in err and "--edges" in err
    code, _, err = _cli(capsys, "--edges", str(nights["a"]), "--add", str(nights["add"]),
                        "--home", str(home))
    assert code == 2 and "either" in err
    code, _, err = _cli(capsys, "--home", str(home))
    assert code == 2 and "--edges" in err
    assert not (home / "current").exists()
