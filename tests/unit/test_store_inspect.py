"""`shardrank inspect` shows what the issue lists (text and JSON), checked independently.

Counts come from a small graph worked by hand; degree quantiles from numpy.quantile over degrees
taken from a scipy.sparse CSR of the same edges; bytes on disk from walking the directory.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions
from shardrank.cli.main import main
from tests.conftest import random_graph, reference_csr

# worked by hand: a->b twice (1 duplicate), b->b (self-loop), b->c, c->a, d->a; e only a target
SRC = ["a", "a", "b", "b", "c", "d", "d"]
DST = ["b", "b", "b", "c", "a", "a", "e"]


@pytest.fixture
def store(tmp_path: Path) -> Path:
    f = tmp_path / "e.parquet"
    pq.write_table(pa.table({"src": SRC, "dst": DST}), f)
    out = tmp_path / "s"
    shardrank.build_store([f], out, BuildOptions(block_nodes=2))
    return out


def _dir_bytes(p: Path) -> int:
    return sum((Path(r) / f).stat().st_size for r, _d, fs in os.walk(p) for f in fs)


def test_json_facts(store: Path, capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    assert main(["inspect", str(store), "--json"]) == 0
    f = json.loads(capsys.readouterr().out)
    assert (f["nodes"], f["edges"], f["dead_ends"]) == (5, 6, 1)  # e has no out-links
    assert f["self_loops"] == 1 and f["duplicates_merged"] == 1
    assert f["no_in_links"] == 1  # d
    assert f["rows_read"] == 7 and f["key_type"] == "string" and f["weighted"] is False
    assert f["bytes_on_disk"] == _dir_bytes(store)
    b = f["blocks"]
    assert b["count"] == 3 and b["block_nodes"] == 2
    # ids a0 b1 c2 d3 e4; in-edges: a<-c,d  b<-a,b  c<-b  d<-  e<-d
    assert [(s["first_node"], s["nodes"], s["edges"]) for s in b["sizes"]] == [
        (0, 2, 4),
        (2, 2, 1),
        (4, 1, 1),
    ]
    files = {p.name: p.stat().st_size for p in (store / "shards").iterdir()}
    for s in b["sizes"]:
        assert s["bytes"] == sum(
            v for k, v in files.items() if k.startswith(f"block-{s['index']:06d}.")
        )
    assert (b["edges_min"], b["edges_max"]) == (1, 4)
    assert f["out_degree"]["max"] == 2 and f["in_degree"]["max"] == 2


def test_text_shows_every_fact(store: Path, capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    assert main(["inspect", str(store)]) == 0
    out = capsys.readouterr().out
    for label in (
        "nodes",
        "edges",
        "dead ends",
        "self-loops",
        "duplicates merged",
        "no in-links",
        "out-degree",
        "in-degree",
        "blocks",
        "bytes on disk",
        "block 0",
        "block 2",
    ):
        assert label in out, label
    lines = {ln.split("  ")[0].strip(): ln for ln in out.splitlines()}
    assert lines["nodes"].split()[1] == "5" and lines["dead ends"].split()[2] == "1"
    assert f"{_dir_bytes(store):,}" in lines["bytes on disk"]


def test_degree_quantiles_against_numpy(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    src, dst = random_graph(rng, 300, 2000)
    f = tmp_path / "e.parquet"
    pq.write_table(pa.table({"src": src, "dst": dst}), f)
    shardrank.build_store([f], tmp_path / "s", BuildOptions(block_nodes=16))
    facts = shardrank.inspect_store(tmp_path / "s")
    _, ref = reference_csr(src.tolist(), dst.tolist())
    ref.data[:] = 1
    in_deg, out_deg = np.diff(ref.indptr), np.diff(ref.tocsc().indptr)
    for name, deg in (("in_degree", in_deg), ("out_degree", out_deg)):
        q = facts[name]
        # numpy.quantile with its default (linear) method
        expect = np.quantile(deg, [0, 0.5, 0.9, 0.99, 0.999, 1])
        np.testing.assert_allclose(
            [q[k] for k in ("min", "p50", "p90", "p99", "p999", "max")], expect
        )
    assert facts["dead_ends"] == int(np.count_nonzero(out_deg == 0))
    assert facts["no_in_links"] == int(np.count_nonzero(in_deg == 0))
    assert facts["blocks"]["count"] == len(facts["blocks"]["sizes"]) > 8


def test_many_blocks_print_a_summary(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "e.csv"
    f.write_text("src,dst\n" + "".join(f"{i},{(i + 1) % 40}\n" for i in range(40)))
    assert main(["build", str(f), "--out", str(tmp_path / "s"), "--block-nodes", "4", "-q"]) == 0
    capsys.readouterr()
    assert main(["inspect", str(tmp_path / "s")]) == 0
    out = capsys.readouterr().out
    assert "10 of 4 nodes" in out and "block 0" not in out


def test_inspect_a_missing_store(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["inspect", str(tmp_path / "nope")]) == 2
    assert "no such store" in capsys.readouterr().err
