"""Invariants of a rank run on random small graphs (hypothesis).

For any graph, damping, method, dead-end policy, teleport and block size: the scores are a
probability vector (finite, non-negative, mass 1 within 1e-12), run.json keeps one history
entry per iteration, and the result is within tol of the exact solution (scipy direct solve,
see tests/reference/test_exact_solve.py) with a recorded bound that really bounds the error.
"""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import shardrank
from shardrank import BuildOptions, RankOptions
from tests.conftest import write_edges
from tests.reference.test_exact_solve import (
    dense_teleport,
    exact_pagerank,
    node_ids,
    write_teleport,
)


@st.composite
def problems(draw: st.DrawFn) -> dict[str, object]:
    n = draw(st.integers(1, 30))
    m = draw(st.integers(1, 90))
    src = draw(st.lists(st.integers(0, n - 1), min_size=m, max_size=m))
    dst = draw(st.lists(st.integers(0, n - 1), min_size=m, max_size=m))
    weighted = draw(st.booleans())
    w = draw(st.lists(st.floats(0.01, 100.0), min_size=m, max_size=m)) if weighted else None
    keys = sorted(set(src) | set(dst))
    t_keys = draw(st.none() | st.lists(st.sampled_from(keys), min_size=1, max_size=5))
    t_w = None if t_keys is None else [draw(st.floats(0.1, 10.0)) for _ in t_keys]
    return {
        "src": src,
        "dst": dst,
        "w": w,
        "t_keys": t_keys,
        "t_w": t_w,
        "damping": draw(st.sampled_from([0.05, 0.5, 0.85, 0.95])),
        "method": draw(st.sampled_from(["power", "gauss-seidel"])),
        "dead_ends": draw(st.sampled_from(["teleport", "uniform"])),
        "block_nodes": draw(st.sampled_from([1, 3, 8, 1000])),
        "tol": draw(st.sampled_from([1e-6, 1e-10, 1e-13])),
    }


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(problems())
def test_a_run_is_a_probability_vector_within_tol_of_the_answer(p: dict) -> None:  # type: ignore[type-arg]
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        f = write_edges(tmp / "e.parquet", p["src"], p["dst"], p["w"])
        store = tmp / "store"
        shardrank.build_store(
            [f],
            store,
            BuildOptions(weight="w" if p["w"] is not None else None, block_nodes=p["block_nodes"]),
        )
        tele = None
        if p["t_keys"] is not None:
            tele = str(write_teleport(tmp / "t.parquet", p["t_keys"], p["t_w"]))
        opts = RankOptions(
            damping=p["damping"],
            method=p["method"],
            dead_ends=p["dead_ends"],
            tol=p["tol"],
            teleport=tele,
            threads=1,
        )
        res = shardrank.rank(store, tmp / "run", opts)
        r = np.asarray(res.scores)
        assert res.converged
        # a probability vector, as checked after every iteration
        assert np.all(np.isfinite(r)) and r.min() >= 0.0
        assert abs(float(r.sum()) - 1.0) <= 1e-12
        # one history entry per iteration, all of the chosen kind; the last one is the bound it stopped on
        doc = json.loads((tmp / "run" / "run.json").read_text())
        hist = doc["history"]
        assert (
            len(hist["residual"])
            == len(hist["error_bound"])
            == len(hist["step"])
            == doc["iterations"]
        )
        assert set(hist["step"]) == {p["method"]}
        assert hist["error_bound"][-1] == doc["error_bound"] <= p["tol"]
        # scipy direct solve
        keys = np.array(sorted(set(p["src"]) | set(p["dst"])))
        s_id, d_id = node_ids(keys, np.array(p["src"]), np.array(p["dst"]))
        v = None
        if p["t_keys"] is not None:
            v = dense_teleport(keys, np.array(p["t_keys"]), np.array(p["t_w"]))
        w = None if p["w"] is None else np.array(p["w"])
        exact = exact_pagerank(s_id, d_id, w, keys.size, p["damping"], v, p["dead_ends"])
        err = float(np.abs(r - exact).sum())
        # the direct solve itself carries rounding error ~1e-16 per entry
        assert err <= res.error_bound + 1e-14
