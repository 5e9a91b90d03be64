"""An invented web crawl (every name made up; hosts use the reserved .example domain).

The crawl has ordinary hosts whose popularity follows a power law, pages linking within their
host and out to other hosts, PDF pages that link nowhere (dead ends), a small trusted seed
list of reference hosts, and a link farm: junk hosts whose pages link to each other and to
one promoted shop, which links back into the farm (a trap: score that enters never leaves
except by teleporting), reached from the honest web by a handful of spam comments.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

_A = [
    "amber",
    "birch",
    "cobalt",
    "dune",
    "ember",
    "fable",
    "garnet",
    "harbor",
    "iris",
    "juniper",
    "kestrel",
    "lumen",
    "maple",
    "nimbus",
    "orchid",
    "pebble",
    "quill",
    "rowan",
    "sable",
    "thistle",
    "umber",
    "vesper",
    "willow",
    "yarrow",
    "zephyr",
]
_B = [
    "works",
    "press",
    "forge",
    "garden",
    "labs",
    "market",
    "notes",
    "atlas",
    "guild",
    "depot",
    "journal",
    "studio",
    "archive",
    "commons",
    "outpost",
    "bakery",
    "foundry",
    "circle",
]
SIZES = {"small": (400, 20), "medium": (3500, 20)}  # hosts, mean pages per host
FARM = {"small": (40, 15), "medium": (150, 20)}  # link-farm hosts, pages per farm host


@dataclass
class Scenario:
    edges: Path
    seeds: Path
    farm_pages: list[str]
    n_farm_hosts: int
    promoted: str
    n_hosts: int
    n_seeds: int
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
    pages_per_host = np.maximum(
        2, rng.zipf(1.8, n_hosts).clip(max=40 * mean_pages) * mean_pages // 4
    )
    popularity = rng.pareto(1.2, n_hosts) + 1.0
    popularity /= popularity.sum()
    urls: list[list[str]] = []
    for h, n in zip(hosts, pages_per_host.tolist(), strict=True):
        paths = ["/"] + [
            f"/{'docs' if i % 7 == 0 else 'post'}/{i}{'.pdf' if i % 11 == 0 else ''}"
            for i in range(1, n)
        ]
        urls.append([f"https://{h}{p}" for p in paths])
    # Links by global page number (vectorised: the medium crawl has ~10^6 links).
    n_of = pages_per_host.astype(np.int64)
    base = np.concatenate([[0], np.cumsum(n_of)[:-1]])
    host = np.repeat(np.arange(n_hosts), n_of)
    local = np.arange(int(n_of.sum())) - base[host]
    live = ~((local % 11 == 0) & (local > 0))  # PDFs link nowhere: dead ends
    page = np.flatnonzero(live)
    up = page[local[page] > 0]  # every page but the home page links home
    parts_src, parts_dst = [up], [base[host[up]]]
    inner = (rng.random((page.size, 3)) * n_of[host[page]][:, None]).astype(
        np.int64
    )  # 3 links within the host
    keep = inner != local[page][:, None]
    parts_src.append(np.repeat(page, 3)[keep.ravel()])
    parts_dst.append((base[host[page]][:, None] + inner)[keep])
    n_out = rng.integers(0, 4, page.size)  # 0-3 links to other hosts, by popularity
    out_src = np.repeat(page, n_out)
    th = np.minimum(np.searchsorted(np.cumsum(popularity), rng.random(out_src.size)), n_hosts - 1)
    deep = (rng.random(out_src.size) * n_of[th]).astype(np.int64)
    parts_src.append(out_src)
    parts_dst.append(base[th] + np.where(rng.random(out_src.size) < 0.6, 0, deep))
    flat = np.array([u for pages in urls for u in pages], dtype=object)
    src: list[str] = flat[np.concatenate(parts_src)].tolist()
    dst: list[str] = flat[np.concatenate(parts_dst)].tolist()
    # the link farm: every farm page links to the promoted shop and to two other farm pages;
    # the shop links back into the farm, so the farm keeps what flows in
    n_fh, per_host = FARM[size]
    farm = [
        f"https://best-deals-{h:03d}.example/{'' if p == 0 else f'offer/{p}'}"
        for h in range(n_fh)
        for p in range(per_host)
    ]
    promoted = "https://miracle-gadget-shop.example/"
    for i, f in enumerate(farm):
        for j in (i + 1, i + 7):
            src.append(f)
            dst.append(farm[j % len(farm)])
        src.append(f)
        dst.append(promoted)
    for j in range(0, len(farm), max(1, len(farm) // 3)):
        src.append(promoted)
        dst.append(farm[j])
    # spam comments on deep pages of obscure honest hosts (the less popular half)
    obscure = np.argsort(popularity)[: n_hosts // 2]
    for _ in range(12):
        victim = urls[int(rng.choice(obscure))]
        src.append(victim[int(rng.integers(1, len(victim)))])
        dst.append(farm[int(rng.integers(0, len(farm)))])
    out_dir.mkdir(parents=True, exist_ok=True)
    edges = out_dir / "edges.parquet"
    pq.write_table(pa.table({"src": src, "dst": dst}), edges)
    order = np.argsort(-popularity)[:12]
    seeds = out_dir / "trusted-seeds.csv"
    seeds.write_text("key,weight\n" + "".join(f"{urls[int(i)][0]},1\n" for i in order))
    n_pages = len(set(src) | set(dst))
    return Scenario(edges, seeds, farm, n_fh, promoted, n_hosts, len(order), n_pages, len(src))
