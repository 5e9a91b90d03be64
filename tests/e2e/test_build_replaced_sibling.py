"""An --overwrite killed between its two renames leaves `.NAME.old-PID`; the next build cleans it
once a store is in place again, and never while it is the only copy."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import shardrank
from shardrank import BuildOptions
from tests.conftest import write_edges


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_old_sibling_is_removed_only_when_a_store_is_in_place(tmp_path: Path) -> None:
    edges = write_edges(tmp_path / "e.parquet", [1, 2, 3], [2, 3, 1])
    store = tmp_path / "s"
    shardrank.build_store([edges], store)
    old = tmp_path / f".s.old-{_dead_pid()}"
    os.replace(store, old)  # the state right after the first rename of an --overwrite publish
    # no store in place: the old one is the only copy and must survive this build
    shardrank.build_store([edges], store)
    # that build published a store; the next build may now drop the aside copy
    assert old.is_dir()
    shardrank.build_store([edges], store, BuildOptions(overwrite=True))
    assert not old.exists()
    assert shardrank.open_store(store, verify=True).n_nodes == 3
