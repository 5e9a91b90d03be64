"""The report's plots as inline SVG text (matplotlib, no pyplot: no global backend or GUI).

Every plot is drawn from small summaries (at most a few thousand points) so the HTML stays
small whatever N is; no key ever goes into a plot.
"""

from __future__ import annotations

import html
import io
import re
from collections.abc import Sequence
from typing import Any

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from . import palette

_CHUNK = 1 << 22  # scores histogrammed per pass (bounded memory on memory-mapped arrays)
_BINS = 240  # log-spaced bins of score x N for the distribution plot
# Left edge of the distribution plot, in units of the uniform share. A seeded teleport leaves
# nodes it cannot reach with scores near 1e-80; drawn, they would squash the readable part.
FLOOR_X_N = 1e-4

_STYLE: Any = {  # Any: matplotlib types rc keys as a Literal union
    "font.size": 10.0,
    "axes.edgecolor": palette.RULE,
    "axes.labelcolor": palette.INK,
    "axes.titlesize": 10.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": palette.GRID,
    "grid.linewidth": 0.6,
    "xtick.color": palette.MUTED,
    "ytick.color": palette.MUTED,
    "legend.frameon": False,
    "svg.fonttype": "path",  # text as outlines: the same look without fonts installed
}


def _figure() -> Figure:
    return Figure(figsize=(6.4, 3.5), layout="constrained")


def to_svg(fig: Figure, name: str, label: str) -> str:
    """The figure as one ``<svg>`` element that scales to its container.

    ``name`` salts matplotlib's element ids so that several plots can share one page;
    ``label`` is the accessible description (plain words, escaped here).
    """
    buf = io.StringIO()
    with matplotlib.rc_context({**_STYLE, "svg.hashsalt": f"shardrank-{name}"}):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    svg = buf.getvalue()
    svg = svg[svg.index("<svg") :]
    svg = re.sub(r"<metadata>.*?</metadata>", "", svg, count=1, flags=re.S)  # RDF boilerplate
    # fixed pt sizes -> scale with the page; the viewBox keeps the aspect ratio
    svg = re.sub(
        r'<svg([^>]*?) width="[^"]*" height="[^"]*"',
        rf'<svg\1 class="plot" role="img" aria-label="{html.escape(label)}"',
        svg,
        count=1,
    )
    return svg


def convergence(history: dict[str, Sequence[Any]], tol: float) -> str:
    """Residual of every step and the guaranteed L1 error bound each step measured."""
    res = np.array([np.nan if v is None else v for v in history.get("residual", [])], dtype=float)
    bnd = np.array(
        [np.nan if v is None else v for v in history.get("error_bound", [])], dtype=float
    )
    steps = list(history.get("step", [])) or ["power"] * res.size
    it = np.arange(1, res.size + 1)
    with matplotlib.rc_context(_STYLE):
        fig = _figure()
        ax = fig.add_subplot()
        ax.set_yscale("log")
        pos = res > 0
        ax.plot(it[pos], res[pos], color=palette.LINE_A, lw=1.4, label="residual (change per step)")
        power = np.array([s == "power" for s in steps[: res.size]], dtype=bool) & pos
        if power.any() and not power.all():
            ax.plot(it[power], res[power], "o", ms=3.5, color=palette.LINE_A, label="power step")
        okb = np.isfinite(bnd) & (bnd > 0)
        if okb.any():
            ax.plot(
                it[okb],
                bnd[okb],
                "D",
                ms=4.5,
                mfc="none",
                mew=1.2,
                color=palette.LINE_B,
                label="guaranteed L1 error bound",
            )
        if tol > 0:
            ax.axhline(tol, color=palette.MUTED, lw=1.0, ls=(0, (4, 3)), label=f"tolerance {tol:g}")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_xlabel("iteration")
        ax.set_ylabel("L1 norm (log scale)")
        ax.legend(loc="upper right", fontsize=8)
    return to_svg(fig, "convergence", "residual and error bound per iteration, log scale")


def ccdf_points(
    scores: np.ndarray, bins: int = _BINS, floor: float = FLOOR_X_N
) -> tuple[np.ndarray, np.ndarray, float]:
    """x = score x N at log-spaced edges, y = share of nodes with score x N >= x.

    Reads ``scores`` in chunks (it may be a memory map). Scores below ``floor`` times the
    uniform share are left out; the third value is the share of nodes they are.
    """
    n = scores.shape[0]
    lo, hi = np.inf, 0.0
    below = 0
    for s in range(0, n, _CHUNK):
        c = np.asarray(scores[s : s + _CHUNK]) * n
        keep = c >= floor
        below += int(c.size - np.count_nonzero(keep))
        c = c[keep]
        if c.size:
            lo, hi = min(lo, float(c.min())), max(hi, float(c.max()))
    if not hi > 0:
        return np.zeros(0), np.zeros(0), below / max(n, 1)
    edges = np.geomspace(lo, hi, bins + 1) if hi > lo else np.array([lo, lo * (1 + 1e-9)])
    counts = np.zeros(edges.size - 1, dtype=np.int64)
    for s in range(0, n, _CHUNK):
        c = np.asarray(scores[s : s + _CHUNK]) * n
        counts += np.histogram(c[c >= floor], bins=edges)[0]
    at_least = counts[::-1].cumsum()[::-1]  # nodes in this bin or above
    return edges[:-1], at_least / n, below / n


def distribution(runs: Sequence[tuple[str, np.ndarray]]) -> tuple[str, list[float]]:
    """Complementary CDF of score x N, log-log, one line per run (label, scores).

    Returns the SVG and, per run, the share of nodes below :data:`FLOOR_X_N` (not drawn).
    """
    below: list[float] = []
    colors = (palette.LINE_A, palette.LINE_B)
    with matplotlib.rc_context(_STYLE):
        fig = _figure()
        ax = fig.add_subplot()
        ax.set_xscale("log")
        ax.set_yscale("log")
        for (label, scores), color in zip(runs, colors, strict=False):
            x, y, b = ccdf_points(scores)
            below.append(b)
            ax.step(x, y, where="post", color=color, lw=1.5, label=label)
        ax.axvline(1.0, color=palette.MUTED, lw=1.0, ls=(0, (4, 3)), label="uniform share (1/N)")
        ax.set_xlabel("score x N (how many times the uniform share)")
        ax.set_ylabel("share of nodes at or above")
        ax.legend(loc="lower left", fontsize=8)
    return to_svg(fig, "distribution", "complementary CDF of score times N, log-log"), below


def rank_scatter(
    pos_a: Sequence[int | None],
    pos_b: Sequence[int | None],
    n_a: int,
    n_b: int,
    k: int,
    label_a: str = "A",
    label_b: str = "B",
) -> str:
    """Position in run A against position in run B for the union of both top-k (log-log).

    Keys missing from one run sit on a band just past the other's top-k, drawn hollow.
    """
    a = np.array([np.nan if p is None else p for p in pos_a], dtype=float)
    b = np.array([np.nan if p is None else p for p in pos_b], dtype=float)
    both = np.isfinite(a) & np.isfinite(b)
    edge_a = max(float(np.nanmax(a)) if np.isfinite(a).any() else k, k) * 1.6
    edge_b = max(float(np.nanmax(b)) if np.isfinite(b).any() else k, k) * 1.6
    with matplotlib.rc_context(_STYLE):
        fig = Figure(figsize=(5.2, 5.0), layout="constrained")
        ax = fig.add_subplot()
        ax.set_xscale("log")
        ax.set_yscale("log")
        lim = max(edge_a, edge_b) * 1.3
        ax.plot(
            [1, lim], [1, lim], color=palette.MUTED, lw=1.0, ls=(0, (4, 3)), label="same position"
        )
        ax.axvspan(k, lim, color=palette.SHADE, lw=0)
        ax.axhspan(k, lim, color=palette.SHADE, lw=0)
        ax.plot(
            a[both],
            b[both],
            "o",
            ms=3.0,
            alpha=0.7,
            color=palette.LINE_A,
            mew=0,
            label="in both runs",
        )
        only_a = np.isfinite(a) & ~np.isfinite(b)
        only_b = np.isfinite(b) & ~np.isfinite(a)
        if only_a.any() or only_b.any():
            ax.plot(
                np.r_[a[only_a], np.full(only_b.sum(), edge_a)],
                np.r_[np.full(only_a.sum(), edge_b), b[only_b]],
                "o",
                ms=4.0,
                mfc="none",
                color=palette.LINE_B,
                label="in one run only",
            )
        ax.set_xlim(0.8, lim)
        ax.set_ylim(0.8, lim)
        ax.set_xlabel(f"position in {label_a} (1 = highest)")
        ax.set_ylabel(f"position in {label_b}")
        ax.legend(loc="upper left", fontsize=8)
        ax.text(
            0.98,
            0.02,
            f"shaded: beyond the top {k:,}",
            transform=ax.transAxes,
            ha="right",
            va="bottom",
            fontsize=7.5,
            color=palette.MUTED,
        )
    return to_svg(fig, "scatter", "position in one run against position in the other, log-log")
