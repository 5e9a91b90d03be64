"""Shared fixtures: tiny edge tables written as real Parquet/CSV files, and stores built from them."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions


def write_edges(path: Path, src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None,
                names: tuple[str, str, str] = ("src", "dst", "w")) -> Path:
    """Write an edge table; the format follows the suffix (.parquet, .csv, .tsv)."""
    cols: dict[str, Any] = {names[0]: list(src), names[1]: list(dst)}
    if weight is not None:
        cols[names[2]] = list(weight)
    t = pa.table(cols)
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.suffix == ".parquet":
        pq.write_table(t, path)
    else:
        sep = "\t" if path.suffix == ".tsv" else ","
        lines = [sep.join(cols)] + [sep.join(str(c[i]) for c in cols.values()) for i in range(len(src))]
        path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture
def edges_file(tmp_path: Path) -> Callable[..., Path]:
    def make(src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None,
             name: str = "edges.parquet", **kw: Any) -> Path:
        return write_edges(tmp_path / name, src, dst, weight, **kw)

    return make


@pytest.fixture
def build(tmp_path: Path) -> Callable[..., Path]:
    """build(src, dst, weight=None, **BuildOptions) -> store path."""
    counter = iter(range(10**6))

    def make(src: Sequence[Any], dst: Sequence[Any], weight: Sequence[float] | None = None, **opts: Any) -> Path:
        i = next(counter)
        f = write_edges(tmp_path / f"in{i}" / "edges.parquet", src, dst, weight)
        out = tmp_path / f"store{i}"
        shardrank.build_store([f], out, BuildOptions(weight="w" if weight is not None else None, **opts))
        return out

    return make


def random_graph(rng: np.random.Generator, n: int, m: int) -> tuple[np.ndarray, np.ndarray]:
    """A random multigraph with duplicates, self-loops and (usually) dead ends."""
    src = rng.integers(0, n, m)
    dst = rng.integers(0, n, m)
    return src, dst
