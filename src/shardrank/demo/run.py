"""`shardrank demo`: generate the invented crawl, build, rank uniform and seeded, summarise."""

from __future__ import annotations

import time
from pathlib import Path
from typing import IO

import numpy as np

from .. import api
from ..ingest.build import BuildOptions
from ..progress import Reporter
from ..solve.options import RankOptions
from .scenario import generate


def run_demo(directory: str, size: str, rep: Reporter, quiet: bool, out: IO[str]) -> int:
    d = Path(directory)
    t0 = time.monotonic()
    from ..progress import JsonReporter

    rep = rep if isinstance(rep, JsonReporter) else Reporter()  # the demo tells its own story

    def say(s: str = "") -> None:
        if not quiet:
            print(s, file=out)

    say(f"Inventing a web crawl ({size}) in {d}/ ...")
    sc = generate(d, size)
    say(f"  {sc.n_pages:,} pages, {sc.n_links:,} links, a link farm of {len(sc.farm_hosts)} hosts, "
        f"{sc.seeds.name} with trusted hosts")
    store = d / "crawl.store"
    m = api.build_store([sc.edges], store, BuildOptions(overwrite=True, block_nodes=1 << 14), rep)
    say(f"Built {store}: {m.n_nodes:,} nodes, {m.n_edges:,} edges, {m.counts['dead_ends']:,} dead ends, "
        f"{len(m.blocks)} blocks")
    plain = api.rank(store, d / "uniform.run", RankOptions(), rep, overwrite=True)
    seeded = api.rank(store, d / "seeded.run", RankOptions(teleport=str(sc.seeds)), rep, overwrite=True)
    for name, res in (("uniform teleport", plain), ("teleport to trusted seeds", seeded)):
        say()
        say(f"Top 10 pages, {name} ({res.iterations} iterations, L1 error bound {res.error_bound:.1e}):")
        for i, (k, s) in enumerate(res.top(10), 1):
            say(f"  {i:>2}. {s:.3e}  {k}")
    say()
    pos_plain = _positions(plain.scores)
    pos_seeded = _positions(seeded.scores)
    pid = plain.id_of(sc.promoted)
    farm_ids = np.array([plain.id_of(f) for f in sc.farm_hosts])
    say(f"The promoted shop {sc.promoted}")
    say(f"  uniform teleport: position {pos_plain[pid]:,}; seeded teleport: position {pos_seeded[pid]:,}")
    say(f"  the farm's share of all score: {plain.scores[farm_ids].sum() + plain.scores[pid]:.2%} -> "
        f"{seeded.scores[farm_ids].sum() + seeded.scores[pid]:.2%}")
    say()
    say(f"Done in {time.monotonic() - t0:.1f} s. Look up any page with:")
    say(f"  shardrank top {d / 'seeded.run'} -k 25")
    return 0


def _positions(scores: np.ndarray) -> np.ndarray:
    """1-based position of each node, highest score first, ties by id."""
    order = np.lexsort((np.arange(scores.shape[0]), -scores))
    pos = np.empty_like(order)
    pos[order] = np.arange(1, scores.shape[0] + 1)
    return pos
