"""An invented web crawl (every name made up; hosts use the reserved .example domain).

The crawl has ordinary hosts whose popularity follows a power law, pages linking within their
host and out to other hosts, PDF pages that link nowhere (dead ends), a small trusted seed
list of reference hosts, and a link farm: a ring of junk hosts that link to each other and
to one promoted shop, reached from the honest web by a handful of spam comments.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

_A = ["amber", "birch", "cobalt", "dune", "ember", "fable", "garnet", "harbor", "iris", "juniper",
      "kestrel", "lumen", "maple", "nimbus", "orchid", "pebble", "quill", "rowan", "sable", "thistle",
      "umber", "vesper", "willow", "yarrow", "zephyr"]
_B = ["works", "press", "forge", "garden", "labs", "market", "notes", "atlas", "guild", "depot",
      "journal", "studio", "archive", "commons", "outpost", "bakery", "foundry", "circle"]
SIZES = {"small": (400, 20), "medium": (3000, 60)}  # hosts, mean pages per host


@dataclass
class Scenario:
    edges: Path
    seeds: Path
    farm_hosts: list[str]
    promoted: str
    n_pages: int
    n_links: int


def _host_names(rng: np.random.Generator, n: int) -> list[str]:
    names: list[str] = []
    seen: set[str] = set()
    while len(names) < n:
        name = f"{rng.choice(_A)}-{rng.choice(_B)}"
        if name in seen:
            name = f"{name}{len(names)}"
        seen.add(name)
        names.append(f"{name}.example")
    return names


def generate(out_dir: Path, size: str = "small", seed: int = 20261202) -> Scenario:
    """Write ``edges.parquet`` (src, dst URLs) and ``trusted-seeds.csv`` (key, weight)."""
    rng = np.random.default_rng(seed)
    n_hosts, mean_pages = SIZES[size]
    hosts = _host_names(rng, n_hosts)
    pages_per_host = np.maximum(2, rng.zipf(1.8, n_hosts).clip(max=40 * mean_pages) * mean_pages // 4)
    popularity = rng.pareto(1.2, n_hosts) + 1.0
    popularity /= popularity.sum()
    urls: list[list[str]] = []
    for h, n in zip(hosts, pages_per_host.tolist(), strict=True):
        paths = ["/"] + [f"/{'docs' if i % 7 == 0 else 'post'}/{i}{'.pdf' if i % 11 == 0 else ''}" for i in range(1, n)]
        urls.append([f"https://{h}{p}" for p in paths])
    src: list[str] = []
    dst: list[str] = []
    for hi, pages in enumerate(urls):
        home = pages[0]
        for pi, page in enumerate(pages):
            if page.endswith(".pdf"):
                continue  # PDFs link nowhere: dead ends
            if pi:
                src.append(page)
                dst.append(home)
            for j in rng.integers(0, len(pages), 3):
                if j != pi:
                    src.append(page)
                    dst.append(pages[int(j)])
            for th in rng.choice(n_hosts, int(rng.integers(0, 4)), p=popularity):
                tp = urls[int(th)]
                src.append(page)
                dst.append(tp[0] if rng.random() < 0.6 else tp[int(rng.integers(0, len(tp)))])
    # the link farm: junk hosts linking to each other and to one promoted shop
    farm = [f"https://best-deals-{i:03d}.example/" for i in range(60 if size == "small" else 200)]
    promoted = "https://miracle-gadget-shop.example/"
    for i, f in enumerate(farm):
        for k in (1, 2, 3):
            src.append(f)
            dst.append(farm[(i + k) % len(farm)])
        src.append(f)
        dst.append(promoted)
    src.append(promoted)
    dst.append(farm[0])
    for _ in range(12):  # spam comments on honest pages
        h = urls[int(rng.integers(0, n_hosts))]
        src.append(h[int(rng.integers(0, len(h)))])
        dst.append(farm[int(rng.integers(0, len(farm)))])
    out_dir.mkdir(parents=True, exist_ok=True)
    edges = out_dir / "edges.parquet"
    pq.write_table(pa.table({"src": src, "dst": dst}), edges)
    order = np.argsort(-popularity)[:12]
    seeds = out_dir / "trusted-seeds.csv"
    seeds.write_text("key,weight\n" + "".join(f"{urls[int(i)][0]},1\n" for i in order))
    n_pages = len(set(src) | set(dst))
    return Scenario(edges, seeds, farm, promoted, n_pages, len(src))
