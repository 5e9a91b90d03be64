#!/usr/bin/env python3
"""How few iterations can any stopping rule give? The shipped power and Gauss-Seidel iterations
on one store, with the true L1 error of every iterate next to the bound the solver certifies.

The reference x* is the same solver run to a certified bound of 1e-14 (so every "true error"
below is exact to +-1e-14). For each method the script prints, per iteration, the certified
bound and the true error ||x_k - x*||_1, then the iteration at which the bound first reaches
--tol (what a run does) and the iteration at which the true error first does (what an oracle
that knew x* could do: a lower limit for any certified stopping rule on this iteration).

usage: scripts/gs_limits.py /work/bench-data/s23v2 [--tol 1e-9] [--threads 2]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from shardrank.progress import Reporter
from shardrank.solve.checkpoint import IterState
from shardrank.solve.driver import iterate
from shardrank.solve.engine import LocalEngine
from shardrank.solve.options import RankOptions
from shardrank.solve.problem import Problem, Teleport
from shardrank.store.reader import StoreReader


def run(reader: StoreReader, method: str, tol: float, threads: int, reference: np.ndarray | None):
    n = reader.n_nodes
    engine = LocalEngine(reader, Problem(0.85, Teleport(n), "teleport"), threads)
    r = np.full(n, 1.0 / n)
    errors: list[float] = []

    def hook(x: np.ndarray, _state: IterState) -> None:
        if reference is not None:
            errors.append(float(np.abs(x - reference).sum()))

    opts = RankOptions(method=method, tol=tol, checkpoint_every=1, max_iter=200)
    st = iterate(engine, r, IterState(), opts, Reporter(), hook)
    hook(r, st)  # the converged iterate is not checkpointed
    engine.close()
    return r, st, errors


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("store", type=Path)
    p.add_argument("--tol", type=float, default=1e-9)
    p.add_argument("--threads", type=int, default=2)
    a = p.parse_args()
    reader = StoreReader.open(a.store)
    t = time.perf_counter()
    ref, st, _ = run(reader, "gauss-seidel", 1e-14, a.threads, None)
    print(f"reference: {st.iteration} sweeps to a certified bound of {st.error_bound:.2e} "
          f"({time.perf_counter() - t:.1f} s)")
    for method in ("power", "gauss-seidel"):
        _, st, err = run(reader, method, a.tol, a.threads, ref)
        print(f"\n{method}: iteration, certified bound, true L1 error, bound / error")
        for k, (b, e) in enumerate(zip(st.bounds, err, strict=True), start=1):
            print(f"  {k:3d}  {b:.3e}  {e:.3e}  {b / max(e, 1e-300):8.1f}")
        oracle = next((k for k, e in enumerate(err, start=1) if e <= a.tol), None)
        print(f"  stops (bound <= {a.tol:g}) at {st.iteration}; true error first <= {a.tol:g} "
              f"at {oracle}")


if __name__ == "__main__":
    main()
