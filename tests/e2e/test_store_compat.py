"""A version-1 store (shard sources are node ids, no read slots) still verifies and ranks.

Stores outlive upgrades (a nightly refresh reuses yesterday's generation), so this version
must read the format before read slots. The version-1 store here is made from a version-2
one by undoing the slots exactly as docs/store-format.md describes version 1, with the
manifest rewritten to match; then both must give the same scores (the summation order within
a row differs, so equal to rounding, not bitwise).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import shardrank
from shardrank import BuildOptions, RankOptions
from shardrank.cli.main import main
from shardrank.store import layout
from shardrank.store.atomic import sha256_file
from shardrank.store.manifest import FileInfo, encode_manifest, read_manifest
from shardrank.store.slots import ids_by_slot


def _to_version_1(store: Path) -> None:
    m = read_manifest(store)
    slot = np.load(store / layout.READ_SLOT, allow_pickle=False)
    ids = ids_by_slot(slot)
    for b in m.blocks:
        off = np.load(store / layout.shard_offsets(b.index), allow_pickle=False)
        src = np.load(store / layout.shard_sources(b.index), allow_pickle=False)
        wpath = store / layout.shard_weights(b.index)
        w = np.load(wpath, allow_pickle=False) if m.weighted else None
        new_src = ids[src].astype(src.dtype)
        new_w = None if w is None else w.copy()
        for j in range(off.size - 1):  # each row ascending by id again, weights alongside
            a, e = int(off[j]), int(off[j + 1])
            order = np.argsort(new_src[a:e], kind="stable")
            new_src[a:e] = new_src[a:e][order]
            if new_w is not None and w is not None:
                new_w[a:e] = w[a:e][order]
        for name, arr in ((layout.shard_sources(b.index), new_src), (layout.shard_weights(b.index), new_w)):
            if arr is None:
                continue
            np.save(store / name, arr, allow_pickle=False)
            m.files[name] = FileInfo(bytes=(store / name).stat().st_size, sha256=sha256_file(store / name))
    (store / layout.READ_SLOT).unlink()
    del m.files[layout.READ_SLOT]
    m.version = 1
    m.fingerprint = m.compute_fingerprint()
    (store / layout.MANIFEST).write_bytes(encode_manifest(m))


def test_a_version_1_store_verifies_and_ranks_like_version_2(tmp_path: Path) -> None:
    rng = np.random.default_rng(21)
    n, m = 300, 2500
    src, dst = rng.integers(0, n, m) * 7, rng.integers(0, n, m) * 7
    pq.write_table(pa.table({"src": src, "dst": dst, "w": rng.uniform(0.5, 2.0, m)}), tmp_path / "e.parquet")
    for weighted in (False, True):
        v2 = tmp_path / f"v2-{weighted}"
        shardrank.build_store([tmp_path / "e.parquet"], v2,
                              BuildOptions(weight="w" if weighted else None, block_nodes=64))
        v1 = tmp_path / f"v1-{weighted}"
        shutil.copytree(v2, v1)
        _to_version_1(v1)
        assert json.loads((v1 / "manifest.json").read_text())["version"] == 1
        assert main(["verify", str(v1), "-q"]) == 0
        for method in ("power", "gauss-seidel"):
            a = shardrank.rank(v2, tmp_path / f"r2-{weighted}-{method}", RankOptions(method=method, tol=1e-12))
            b = shardrank.rank(v1, tmp_path / f"r1-{weighted}-{method}", RankOptions(method=method, tol=1e-12))
            assert a.iterations == b.iterations
            np.testing.assert_allclose(np.asarray(a.scores), np.asarray(b.scores), rtol=1e-12, atol=0)
