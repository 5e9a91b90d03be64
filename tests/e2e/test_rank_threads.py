"""Scores are bitwise identical for any thread count (fixed chunking and reduction order)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numba
import numpy as np
import pytest

import shardrank
from shardrank import RankOptions, settings
from tests.reference.test_exact_solve import write_teleport

pytestmark = pytest.mark.skipif(numba.config.NUMBA_NUM_THREADS < 2, reason="needs two cores")

CLI = Path(sys.executable).with_name("shardrank")


@pytest.fixture(scope="module")
def big_blocks(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """Three blocks of 2.5 x ROW_CHUNK rows each (so each block runs three chunks in parallel),
    weighted, with dead ends, and a teleport table (every kernel branch is taken)."""
    from tests.conftest import write_edges

    tmp = tmp_path_factory.mktemp("threads")
    chunk = settings.ROW_CHUNK
    block = chunk * 5 // 2
    n = 3 * block
    rng = np.random.default_rng(4096)
    m = 4 * n
    src, dst = rng.integers(0, n, m), rng.integers(0, n, m)
    f = write_edges(
        tmp / "e.parquet", src.tolist(), dst.tolist(), rng.uniform(0.5, 2.0, m).tolist()
    )
    store = tmp / "store"
    m_ = shardrank.build_store([f], store, shardrank.BuildOptions(weight="w", block_nodes=block))
    assert len(m_.blocks) == 3 and all(b.n_nodes > chunk for b in m_.blocks)
    keys = np.unique(np.concatenate([src, dst]))
    tele = write_teleport(
        tmp / "t.parquet", keys[::7].tolist(), rng.uniform(0.1, 1.0, keys[::7].size).tolist()
    )
    return store, tele


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_one_and_two_threads_give_the_same_bytes(
    big_blocks: tuple[Path, Path], tmp_path: Path, method: str
) -> None:
    store, tele = big_blocks
    outs = []
    for threads in (1, 2):
        res = shardrank.rank(
            store,
            tmp_path / f"t{threads}",
            RankOptions(method=method, threads=threads, teleport=str(tele), tol=1e-8),
        )
        assert res.converged and res.summary["threads"] == threads
        outs.append((res.run_dir / "scores.npy").read_bytes())  # type: ignore[operator]
    assert outs[0] == outs[1]


def test_cli_processes_with_one_and_two_threads_agree(
    big_blocks: tuple[Path, Path], tmp_path: Path
) -> None:
    """The same through the console script, one fresh process per thread count (numba's thread
    pool is per process)."""
    store, tele = big_blocks
    digests = []
    for threads in ("1", "2"):
        run = tmp_path / f"cli{threads}"
        p = subprocess.run(
            [
                str(CLI),
                "rank",
                str(store),
                "--out",
                str(run),
                "--threads",
                threads,
                "--teleport",
                str(tele),
                "--tol",
                "1e-8",
                "-q",
            ],
            capture_output=True,
            text=True,
            env={**os.environ, "NUMBA_NUM_THREADS": "2"},
        )
        assert p.returncode == 0, p.stderr
        doc = json.loads((run / "run.json").read_text())
        assert doc["threads"] == int(threads)
        digests.append(doc["scores"]["sha256"])
        assert (run / "scores.npy").read_bytes() == (tmp_path / "cli1" / "scores.npy").read_bytes()
    assert digests[0] == digests[1]
