"""Assemble the report of one run (optionally against a baseline run) into one HTML file."""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path
from typing import Any

from .. import settings
from ..errors import BadInputError, DamagedDataError
from ..results.compare import RunLike, as_result, comparison
from ..results.facts import store_facts
from ..results.result import RankResult
from ..results.top import open_run_store, top_rows
from ..store.atomic import fsync_dir
from . import page, plots
from .page import num, text


def _name(res: RankResult) -> str:
    return res.run_dir.name if res.run_dir is not None else "run"


def _teleport(d: dict[str, Any] | None) -> str:
    if not d or d.get("kind") == "uniform":
        return "uniform (every node alike)"
    return text(
        f"{d.get('entries', 0):,} seed keys from {d.get('path')}"
        + (
            f" ({d['unknown_keys_ignored']:,} unknown keys ignored)"
            if d.get("unknown_keys_ignored")
            else ""
        )
    )


def _start(d: dict[str, Any] | None) -> str:
    if not d or d.get("kind") == "uniform":
        return "uniform"
    return text(
        f"warm, from {d.get('path')}: {d.get('matched', 0):,} keys matched, "
        f"{d.get('new_nodes', 0):,} new"
    )


def _head(res: RankResult) -> str:
    s = res.summary
    ok = res.converged
    verdict = (
        f"Converged in {res.iterations:,} iterations: the L1 distance to the exact scores is at "
        f"most {res.error_bound:.2e} (tolerance {s.get('tol', 0):g})."
        if ok
        else f"Not converged: stopped after {res.iterations:,} iterations with an L1 error "
        f"bound of {res.error_bound:.2e}, above the tolerance {s.get('tol', 0):g}."
    )
    return (
        f'<p class="kicker">shardrank run report</p><h1>{text(_name(res))}</h1>'
        f'<p class="verdict{"" if ok else " warn"}">{text(verdict)}</p>'
        f'<p class="meta">{text(res.run_dir)} · finished {text(s.get("finished", "–"))}</p>'
    )


def _graph_section(facts: dict[str, Any] | None, res: RankResult, why_missing: str) -> str:
    if facts is None:
        return f'<p class="note">{text(why_missing)}</p>' + page.facts(
            [("nodes", num(res.n_nodes))]
        )
    q_in, q_out = facts["in_degree"], facts["out_degree"]
    return page.facts(
        [
            ("nodes", num(facts["nodes"])),
            ("edges", num(facts["edges"]) + (" (weighted)" if facts["weighted"] else "")),
            ("dead ends (no out-links)", num(facts["dead_ends"])),
            ("no in-links", num(facts["no_in_links"])),
            ("self-loops kept", num(facts["self_loops"])),
            ("duplicate edges merged", num(facts["duplicates_merged"])),
            ("keys", text(facts["key_type"])),
            (
                "in-degree p50 · p99 · max",
                f"{q_in['p50']:,.0f} · {q_in['p99']:,.0f} · {q_in['max']:,.0f}",
            ),
            (
                "out-degree p50 · p99 · max",
                f"{q_out['p50']:,.0f} · {q_out['p99']:,.0f} · {q_out['max']:,.0f}",
            ),
            ("blocks", num(facts["blocks"]["count"])),
            ("bytes on disk", num(facts["bytes_on_disk"])),
            ("store", text(facts["path"])),
        ]
    )


def _options_section(res: RankResult) -> str:
    s = res.summary
    o = s.get("options", {})
    t = s.get("timings", {})
    items = [
        ("damping", text(o.get("damping"))),
        ("tolerance (L1)", text(o.get("tol"))),
        ("method", text(o.get("method"))),
        ("dead ends", text(o.get("dead_ends"))),
        ("teleport", _teleport(s.get("teleport"))),
        ("start", _start(s.get("init"))),
        ("max iterations", text(o.get("max_iter"))),
        ("engine", text(o.get("engine"))),
        ("threads", text(s.get("threads", o.get("threads")))),
        ("iterating", f"{t.get('iterate_seconds', 0):,.2f} s"),
        ("per iteration", f"{t.get('seconds_per_iteration', 0):,.4f} s"),
        ("edges per second", num(t.get("edges_per_second"))),
        ("peak memory", f"{s.get('peak_memory_bytes', 0) / 2**20:,.0f} MiB"),
        ("store fingerprint", text(str((s.get("store") or {}).get("fingerprint", "–"))[:12])),
    ]
    return page.facts(items)


def _distribution(curves: list[tuple[str, Any]]) -> str:
    svg, below = plots.distribution(curves)
    cap = (
        "For each value x, the share of nodes whose score is at least x times the uniform share "
        "1/N. A straight stretch on these log-log axes is a heavy tail: few nodes hold much of "
        "the score."
    )
    cut = [f"{label}: {b:.1%}" for (label, _), b in zip(curves, below, strict=True) if b > 0]
    if cut:
        cap += (
            f" Nodes below {plots.FLOOR_X_N:g} of the uniform share are not drawn ("
            + "; ".join(cut)
            + " of nodes): typically pages the seeded teleport cannot reach."
        )
    return page.figure(svg, cap)


def _top_section(rows: list[dict[str, Any]], has_degrees: bool) -> str:
    head = [("#", "n"), ("key", "key"), ("score", "n"), ("x N", "n")]
    if has_degrees:
        head += [("in", "n"), ("out", "n")]
    body = []
    for r in rows:
        cells = [num(r["position"]), text(r["key"]), f"{r['score']:.4e}", f"{r['score_x_n']:,.1f}"]
        if has_degrees:
            cells += [num(r["in_degree"]), num(r["out_degree"])]
        body.append(cells)
    note = (
        '<p class="note">x N: the score in units of the uniform share 1/N. "in" and "out" count '
        "distinct linking and linked nodes.</p>"
    )
    return note + page.table(head, body)


def _movers(rows: list[dict[str, Any]]) -> str:
    head = [("key", "key"), ("was", "n"), ("now", "n"), ("change", "n")]
    body = []
    for r in rows[:10]:
        ch = r["position_a"] - r["position_b"]
        cls = "up" if ch > 0 else "down"
        body.append(
            [
                text(r["key"]),
                num(r["position_a"]),
                num(r["position_b"]),
                f'<span class="{cls}">{"+" if ch > 0 else "−"}{abs(ch):,}</span>',
            ]
        )
    return page.table(head, body) if body else '<p class="note">None.</p>'


def _compare_section(res: RankResult, base: RankResult, k: int) -> str:
    summary, union = comparison(base, res, k)
    ov = summary["overlap"]
    tau, rho = summary["kendall_tau"], summary["spearman_rho"]
    items = [
        ("baseline", text(base.run_dir)),
        ("L1 distance", f"{summary['l1']:.3e}"),
        ("largest change of one score", f"{summary['max_abs_diff']:.3e}"),
        (f"Kendall tau (top {k:,})", "–" if tau is None else f"{tau:.4f}"),
        (f"Spearman rho (top {k:,})", "–" if rho is None else f"{rho:.4f}"),
        *[(f"top-{kk} overlap", f"{v:.1%}") for kk, v in ov.items()],
        ("keys in both", num(summary["common_keys"])),
        ("new keys", num(summary["new_keys"])),
        ("vanished keys", num(summary["vanished_keys"])),
    ]
    svg = plots.rank_scatter(
        union.column("position_a").to_pylist(),
        union.column("position_b").to_pylist(),
        summary["n_a"],
        summary["n_b"],
        k,
        "the baseline",
        "this run",
    )
    return (
        page.facts(items)
        + page.figure(
            svg,
            f"Each dot is a key in the top {k:,} of either run. On the dashed line a key kept "
            "its position; above it, it fell; below it, it rose. Hollow dots are keys that "
            "one run does not have.",
        )
        + "<h3>Biggest risers</h3>"
        + _movers(summary["risers"])
        + "<h3>Biggest fallers</h3>"
        + _movers(summary["fallers"])
    )


def write_report(
    run: RunLike,
    out: str | Path,
    against: RunLike | None = None,
    k: int = settings.TOP_K,
    compare_k: int = settings.COMPARE_K,
    store: str | Path | None = None,
) -> Path:
    """Write a self-contained HTML report of ``run`` to ``out``; return its path.

    Parameters
    ----------
    run
        The run directory (or :class:`RankResult`) to describe.
    out
        The HTML file to write (written to a ``.partial`` sibling, then renamed).
    against
        A baseline run to compare with (joined by key): metrics, a rank-vs-rank scatter, movers.
    k
        Rows of the top table.
    compare_k
        The top-k whose union the comparison looks at.
    store
        The run's store if it moved. When the store cannot be found, the report is still
        written, without graph facts and degrees.
    """
    out = Path(out)
    if not out.parent.is_dir():
        raise BadInputError(f"{out.parent}: no such directory", hint="create it first")
    res = as_result(run)
    facts: dict[str, Any] | None = None
    why = ""
    try:
        facts = store_facts(open_run_store(res, store))
    except (BadInputError, DamagedDataError) as e:
        why = f"Graph facts and degrees are left out: {e.message}"
    rows = top_rows(res, k, store=store, degrees=facts is not None)
    curves = [("this run", res.scores)]
    base = as_result(against) if against is not None else None
    if base is not None:
        curves = [("the baseline", base.scores), ("this run", res.scores)]
    secs = [
        page.section(1, "graph", "The graph", _graph_section(facts, res, why)),
        page.section(2, "options", "Run options", _options_section(res)),
        page.section(
            3,
            "convergence",
            "Convergence",
            page.figure(
                plots.convergence(
                    res.summary.get("history", {}), float(res.summary.get("tol", 0) or 0)
                ),
                "Each step's change (residual) falls roughly geometrically. Every step proves an "
                "upper bound on the L1 distance to the exact scores (diamonds); the run stops "
                "when that bound is below the tolerance.",
            ),
        ),
        page.section(4, "distribution", "Score distribution", _distribution(curves)),
        page.section(5, "top", f"Top {len(rows):,}", _top_section(rows, facts is not None)),
    ]
    toc = [
        ("graph", "Graph"),
        ("options", "Options"),
        ("convergence", "Convergence"),
        ("distribution", "Distribution"),
        ("top", "Top"),
    ]
    if base is not None:
        secs.append(
            page.section(
                6, "comparison", "Against the baseline", _compare_section(res, base, compare_k)
            )
        )
        toc.append(("comparison", "Comparison"))
    from .. import __version__

    now = dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat()
    footer = text(
        f"Written by shardrank {__version__} on {now}. Scores measure link structure, not "
        "quality; see docs/scores.md before reading them as anything else."
    )
    doc = page.document(f"shardrank report: {_name(res)}", _head(res), toc, secs, footer)
    part = out.with_name(out.name + ".partial")
    with open(part, "w", encoding="utf-8") as f:
        f.write(doc)
        f.flush()
        os.fsync(f.fileno())
    os.replace(part, out)
    fsync_dir(out.parent)
    return out
