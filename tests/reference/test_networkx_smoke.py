"""shardrank's PageRank against networkx.pagerank (a general-purpose reference library)."""

from __future__ import annotations

from pathlib import Path

import networkx as nx
import numpy as np
import pytest

import shardrank
from shardrank import RankOptions
from tests.conftest import random_graph


@pytest.mark.parametrize("method", ["power", "gauss-seidel"])
def test_agrees_with_networkx_on_a_random_graph(build, tmp_path: Path, method: str) -> None:
    rng = np.random.default_rng(7)
    src, dst = random_graph(rng, 400, 1500)
    store = build(src, dst, block_nodes=64)
    res = shardrank.rank(store, tmp_path / "run", RankOptions(method=method, tol=1e-12))
    # networkx.pagerank: dead ends spread by the personalization (uniform here), as ours
    g = nx.DiGraph()
    g.add_nodes_from(np.unique(np.concatenate([src, dst])).tolist())
    g.add_edges_from(zip(src.tolist(), dst.tolist(), strict=True))
    ref = nx.pagerank(g, alpha=0.85, tol=1e-15, max_iter=10_000)
    keys = res.keys.to_pylist()
    got = dict(zip(keys, res.scores.tolist(), strict=True))
    assert res.converged and res.error_bound <= 1e-12
    assert max(abs(got[k] - ref[k]) for k in ref) <= 1e-9
    assert abs(float(np.sum(res.scores)) - 1.0) <= 1e-12
