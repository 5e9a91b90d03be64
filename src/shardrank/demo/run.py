"""`shardrank demo`: invent a crawl, build, rank it twice, show what changed, write a report."""

from __future__ import annotations

import time
from pathlib import Path
from typing import IO, Any

import numpy as np

from .. import api
from ..ingest.build import BuildOptions
from ..progress import JsonReporter, Reporter
from ..results.compare import compare_runs, positions_of
from ..results.result import RankResult
from ..solve.options import RankOptions
from .scenario import Scenario, generate

BLOCK_NODES = 1 << 14  # small blocks so that even the small crawl has several shards
N_SHOWN = 10  # top pages printed per run
N_DEMOTED = 5  # fallers printed


def _cut(key: Any, width: int = 70) -> str:
    t = str(key)
    return t if len(t) <= width else t[: width - 1] + "…"


def run_demo(directory: str | Path, size: str, rep: Reporter, quiet: bool, out: IO[str]) -> int:
    """Run the demo in ``directory`` (created; its demo files are replaced); return 0.

    Writes ``edges.parquet``, ``trusted-seeds.csv``, ``crawl.store/``, ``uniform.run/``,
    ``seeded.run/`` and ``report.html`` into ``directory``.
    """
    d = Path(directory)
    t0 = time.monotonic()
    rep = rep if isinstance(rep, JsonReporter) else Reporter()  # the demo tells its own story

    def say(s: str = "") -> None:
        if not quiet:
            print(s, file=out, flush=True)

    say(f"Inventing a web crawl ({size}) in {d}/ ...")
    sc = generate(d, size)
    say(
        f"  {sc.n_pages:,} pages on {sc.n_hosts:,} hosts, {sc.n_links:,} links, "
        "PDFs that link nowhere,"
    )
    say(
        f"  a link farm of {len(sc.farm_pages):,} pages on {sc.n_farm_hosts} hosts "
        "that all point at one shop,"
    )
    say(f"  and {sc.seeds.name}: the home pages of {sc.n_seeds} trusted hosts")
    store = d / "crawl.store"
    m = api.build_store(
        [sc.edges], store, BuildOptions(overwrite=True, block_nodes=BLOCK_NODES), rep
    )
    say(
        f"Built {store}: {m.n_nodes:,} nodes, {m.n_edges:,} edges, "
        f"{m.counts['dead_ends']:,} dead ends, {len(m.blocks)} shards"
    )
    plain = api.rank(store, d / "uniform.run", RankOptions(), rep, overwrite=True)
    seeded = api.rank(
        store, d / "seeded.run", RankOptions(teleport=str(sc.seeds)), rep, overwrite=True
    )
    say(
        f"Ranked twice (damping {RankOptions().damping}, stopping when the L1 error is provably "
        f"<= {RankOptions().tol:g}):"
    )
    for name, res in (("uniform teleport", plain), ("teleport to the trusted seeds", seeded)):
        say(
            f"  {name + ':':<31}{res.iterations} iterations, L1 error bound {res.error_bound:.1e}, "
            f"{res.summary['timings']['iterate_seconds']:.1f} s"
        )
    for name, res in (("uniform teleport", plain), ("teleport to the trusted seeds", seeded)):
        say()
        say(f"Top {N_SHOWN} pages, {name}:")
        say(f"  {'#':>3}  {'score':>9}  {'x N':>7}  page")
        for i, (k, s) in enumerate(res.top(N_SHOWN), 1):
            flag = "  <- link farm" if k == sc.promoted or k in set(sc.farm_pages) else ""
            say(f"  {i:>3}  {s:9.3e}  {s * res.n_nodes:7.1f}  {_cut(k)}{flag}")
    say()
    _demoted(sc, plain, seeded, say)
    say()
    from ..report import write_report

    report = write_report(d / "seeded.run", d / "report.html", against=d / "uniform.run")
    say(f"Report: {report.resolve()}")
    say("  one HTML file (no network needed): open it in a browser, on a phone, or print it.")
    say()
    say(f"Done in {time.monotonic() - t0:.1f} s. Try next:")
    say(f"  shardrank top {d / 'seeded.run'} -k 25")
    say(f"  shardrank top {d / 'uniform.run'} --match best-deals")
    say(f"  shardrank compare {d / 'uniform.run'} {d / 'seeded.run'}")
    say(f"  shardrank export {d / 'seeded.run'} --out {d / 'scores.parquet'}")
    return 0


def _demoted(sc: Scenario, plain: RankResult, seeded: RankResult, say: Any) -> None:
    """What the seeded teleport took away: the shop, the farm's share, the biggest fallers."""
    pid = np.array([plain.id_of(sc.promoted)])
    farm_ids = np.array([plain.id_of(f) for f in sc.farm_pages] + [int(pid[0])])
    pos_a, pos_b = positions_of(plain.scores, pid)[0], positions_of(seeded.scores, pid)[0]
    say("What the seeded teleport demoted:")
    say(f"  the promoted shop {sc.promoted}")
    say(f"    position {pos_a:,} with a uniform teleport, {pos_b:,} with trusted seeds")
    share = farm_ids.size / plain.n_nodes
    say(f"  the link farm and its shop ({farm_ids.size:,} pages, {share:.1%} of all pages)")
    say(
        f"    hold {plain.scores[farm_ids].sum():.2%} of all score with a uniform teleport, "
        f"{seeded.scores[farm_ids].sum():.4%} with trusted seeds"
    )
    cmp = compare_runs(plain, seeded, k=100)
    fell = [r for r in cmp["fallers"] if r["position_a"] <= 100][:N_DEMOTED]
    if fell:
        say("  the pages of the uniform top 100 that fell furthest:")
        for r in fell:
            say(f"    {r['position_a']:>5,} -> {r['position_b']:<7,} {_cut(r['key'])}")
    say(
        f"  top-10 overlap of the two runs {cmp['overlap']['10']:.0%}, "
        f"top-100 {cmp['overlap']['100']:.0%}; L1 distance {cmp['l1']:.2f}"
    )
