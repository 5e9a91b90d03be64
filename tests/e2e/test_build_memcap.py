"""A build whose memory is capped below the size of its raw edge table still succeeds.

The cap is enforced by the kernel (a memory cgroup, through ../shared/tools/memcap next to the
repository), not measured by us: the process is killed if it exceeds the cap. The edge table
holds invented URLs of .example hosts; its raw (uncompressed Arrow) size is measured by
pyarrow and asserted to exceed the cap.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank

pytestmark = pytest.mark.slow

MEMCAP = Path(__file__).resolve().parents[2].parent / "shared" / "tools" / "memcap"
CAP_MIB = 320
N_KEYS, N_EDGES, CHUNK = 500_000, 5_000_000, 1_000_000


def _write_table(path: Path) -> tuple[int, int]:
    """Write the edge table in chunks; return (raw bytes, distinct edges counted with numpy)."""
    rng = np.random.default_rng(17)
    urls = pa.array(
        [f"https://host{i % 997:03d}.example/section/{i:07d}/page.html" for i in range(N_KEYS)]
    )
    schema = pa.schema([("src", pa.string()), ("dst", pa.string())])
    raw, pairs = 0, []
    with pq.ParquetWriter(path, schema, compression="zstd") as w:
        for _ in range(N_EDGES // CHUNK):
            s, d = rng.integers(0, N_KEYS, CHUNK), rng.integers(0, N_KEYS, CHUNK)
            t = pa.table({"src": urls.take(s), "dst": urls.take(d)}, schema=schema)
            raw += t.nbytes
            w.write_table(t)
            pairs.append(s * N_KEYS + d)
    p = np.sort(np.concatenate(pairs))
    return raw, 1 + int(np.count_nonzero(np.diff(p)))


@pytest.mark.skipif(not MEMCAP.is_file(), reason=f"{MEMCAP} not found")
def test_build_under_a_cap_below_the_raw_table(tmp_path: Path) -> None:
    edges = tmp_path / "links.parquet"
    raw, n_edges = _write_table(edges)
    assert raw > CAP_MIB * 2**20 * 1.5, raw  # the raw table is well above the cap
    out = tmp_path / "links.store"
    cmd = [
        str(MEMCAP),
        f"{CAP_MIB}M",
        sys.executable,
        "-c",
        "from shardrank.cli.main import entry; entry()",
        "build",
        str(edges),
        "--out",
        str(out),
        "--memory",
        "200MB",
        "-q",
    ]
    p = subprocess.run(
        cmd,
        capture_output=True,
        text=True,
        timeout=300,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    if p.returncode == 2 and "cannot create a memory cgroup" in p.stderr:
        pytest.skip(p.stderr.strip().splitlines()[-1])
    assert p.returncode == 0, p.stderr[-3000:]
    m = re.search(r"memcap: peak=(\d+) MiB cap=(\d+) MiB", p.stderr)
    assert m and int(m.group(2)) == CAP_MIB
    r = shardrank.open_store(out, verify=True)
    assert r.n_nodes == N_KEYS and r.n_edges == n_edges
    shardrank.verify_store(r)
