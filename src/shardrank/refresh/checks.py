"""What a refresh checks before publishing: the run itself, and the guards against the last one.

Validation (always): the run converged with its guaranteed L1 error bound within tol; the
scores are finite, non-negative and sum to 1 within ``settings.MASS_TOLERANCE``; there is one
score per node of the store it was built from (scores.npy and scores.parquet alike); and
scores.npy still has the checksum run.json recorded.

Guards (optional, against the published run): ``max_l1`` bounds the L1 distance between the
two score vectors matched by key; ``min_overlap = (K, F)`` asks that at least a fraction F of
the new top K were in the old top K.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq

from .. import settings
from ..errors import BadInputError
from ..results import runfiles
from ..results.result import read_run_json
from ..store.atomic import sha256_file


def validate_run(run: Path, n_nodes_built: int) -> tuple[list[str], list[str], np.ndarray | None]:
    """(not-converged reasons, damage reasons, scores) of a finished run."""
    doc = read_run_json(run)
    slow: list[str] = []
    bad: list[str] = []
    if doc.get("status") not in ("converged", "not-converged"):
        return slow, [f"the run did not finish (status {doc.get('status')!r})"], None
    bound, tol = doc.get("error_bound"), doc.get("tol")
    if not doc.get("converged") or bound is None or tol is None or not bound <= tol:
        slow.append(
            f"not converged: L1 error bound {bound} > tol {tol} after {doc.get('iterations')} iterations"
        )
    if doc.get("n_nodes") != n_nodes_built:
        bad.append(
            f"run.json has {doc.get('n_nodes')} nodes but the store was built with {n_nodes_built}"
        )
    f = run / runfiles.SCORES_NPY
    try:
        if sha256_file(f) != doc["scores"]["sha256"]:
            bad.append(f"{f.name} does not match the checksum in run.json")
        r = np.load(f, allow_pickle=False)
    except (OSError, ValueError, KeyError, TypeError) as e:
        return slow, bad + [f"{f.name} cannot be read ({e})"], None
    if r.dtype != np.float64 or r.shape != (n_nodes_built,):
        bad.append(f"{f.name} holds {r.dtype}{r.shape}, expected float64[{n_nodes_built}]")
        return slow, bad, None
    if not np.all(np.isfinite(r)):
        bad.append("scores contain NaN or infinity")
    elif float(r.min()) < 0.0:
        bad.append(f"scores contain negative values (min {float(r.min())!r})")
    else:
        total = float(np.sum(r))
        if abs(total - 1.0) > settings.MASS_TOLERANCE:
            bad.append(f"scores sum to {total!r}, not 1 within {settings.MASS_TOLERANCE:g}")
    try:
        rows = pq.ParquetFile(run / runfiles.SCORES_PARQUET).metadata.num_rows
        if rows != n_nodes_built:
            bad.append(f"{runfiles.SCORES_PARQUET} has {rows} rows, expected {n_nodes_built}")
    except (OSError, ValueError) as e:
        bad.append(f"{runfiles.SCORES_PARQUET} cannot be read ({e})")
    return slow, bad, r


def parse_overlap_guard(text: str) -> tuple[int, float]:
    """``"K:F"`` (e.g. ``"1000:0.9"``) -> (K, F) with K >= 1 and 0 <= F <= 1."""
    try:
        k_s, f_s = text.split(":")
        k, f = int(k_s), float(f_s)
    except ValueError:
        raise BadInputError(
            f"--min-overlap {text!r} is not K:F",
            hint="e.g. --min-overlap 1000:0.9 (90% of the top 1000 stay in the top 1000)",
        ) from None
    if k < 1 or not 0.0 <= f <= 1.0:
        raise BadInputError(f"--min-overlap {text!r}: K must be >= 1 and F between 0 and 1")
    return k, f


def compare_with_previous(prev: Path, new: Path, overlap_k: int | None) -> dict[str, Any]:
    """The comparison of two runs by key (results.compare), trimmed for the summary line.

    Correlations and movers over the top ``settings.COMPARE_K``; the overlap also at
    ``overlap_k`` (the --min-overlap guard), with a second call when that K is not reported.
    """
    from ..results.compare import compare_runs

    c = compare_runs(prev, new, k=settings.COMPARE_K)
    overlap = dict(c["overlap"])
    if overlap_k is not None and str(overlap_k) not in overlap:
        overlap[str(overlap_k)] = compare_runs(prev, new, k=overlap_k)["overlap"][str(overlap_k)]
    return {
        "run": str(prev),
        "l1": c["l1"],
        "max_abs_diff": c.get("max_abs_diff"),
        "kendall_tau": c["kendall_tau"],
        "spearman_rho": c["spearman_rho"],
        "overlap": overlap,
        "new_keys": c["new_keys"],
        "vanished_keys": c["vanished_keys"],
        "risers": c["risers"][:3],
        "fallers": c["fallers"][:3],
    }


def check_guards(
    comparison: dict[str, Any] | None, max_l1: float | None, min_overlap: tuple[int, float] | None
) -> tuple[dict[str, Any], list[str]]:
    """(guard results, reasons for refusing to publish)."""
    results: dict[str, Any] = {}
    reasons: list[str] = []
    if max_l1 is None and min_overlap is None:
        return results, reasons
    if comparison is None:
        return {"skipped": "nothing published yet to compare with"}, reasons
    if max_l1 is not None:
        l1 = float(comparison["l1"])
        ok = l1 <= max_l1
        results["max_l1"] = {"limit": max_l1, "value": l1, "ok": ok}
        if not ok:
            reasons.append(f"L1 distance to the published run is {l1:.4g} > --max-l1 {max_l1:g}")
    if min_overlap is not None:
        k, f = min_overlap
        v = float(comparison["overlap"][str(k)])
        ok = v >= f
        results["min_overlap"] = {"k": k, "limit": f, "value": v, "ok": ok}
        if not ok:
            reasons.append(
                f"top-{k} overlap with the published run is {v:.4g} < --min-overlap {k}:{f:g}"
            )
    return results, reasons


def cold_estimate(doc: dict[str, Any], r: np.ndarray) -> int | None:
    """Iterations a cold (uniform) start would have needed, from this run's own history.

    Model (common practice for a linearly converging iteration): the steps needed grow with
    log(e0 / tol), e0 the L1 distance of the start from the answer. The warm start's e0 is
    estimated by the sum of the measured per-step changes (the path length from the start to
    the result, an upper bound of the distance that is close for geometric convergence); the
    cold start's e0 = ||1/N - r||_1 is exact. A cold run reports its own count.
    """
    iters = int(doc.get("iterations") or 0)
    if doc.get("init", {}).get("kind") != "warm":
        return iters
    tol = float(doc["tol"])
    e_warm = math.fsum(doc.get("history", {}).get("residual", []))
    e_cold = float(np.abs(r - 1.0 / r.shape[0]).sum())
    if not (e_warm > tol and e_cold > tol and iters > 0):
        return None
    return max(iters, round(iters * math.log(e_cold / tol) / math.log(e_warm / tol)))
