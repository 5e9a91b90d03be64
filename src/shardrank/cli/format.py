"""Plain-text tables for the terminal. Keys are untrusted: control characters are escaped."""

from __future__ import annotations

from typing import Any


def safe_text(s: object, width: int | None = None) -> str:
    """Printable form of a key: control characters escaped, optionally cut to ``width``."""
    t = str(s)
    if any(ord(c) < 32 or ord(c) == 127 for c in t):
        t = t.encode("unicode_escape").decode("ascii")
    if width is not None and len(t) > width:
        t = t[: width - 1] + "…"
    return t


def print_top(rows: list[tuple[Any, float]], n_nodes: int, title: str = "") -> None:
    if title:
        print(title)
    print(f"{'#':>4}  {'score':>12}  {'x uniform':>10}  key")
    for i, (key, score) in enumerate(rows, 1):
        print(f"{i:>4}  {score:12.6e}  {score * n_nodes:10.1f}  {safe_text(key, 90)}")


def print_facts(f: dict[str, Any]) -> None:
    b = f["blocks"]
    lines = [
        ("store", f["path"]),
        ("format", f"{f['format']} v{f['version']}  fingerprint {f['fingerprint'][:16]}"),
        ("nodes", f"{f['nodes']:,} ({f['key_type']} keys)"),
        ("edges", f"{f['edges']:,}{' (weighted)' if f['weighted'] else ''}"),
        ("dead ends", f"{f['dead_ends']:,} (no out-links)"),
        ("no in-links", f"{f['no_in_links']:,}"),
        ("self-loops", f"{f['self_loops']:,} kept, {f['self_loop_rows_dropped']:,} rows dropped"),
        ("duplicates merged", f"{f['duplicates_merged']:,}"),
        ("rows read", f"{f['rows_read']:,} ({f['rows_dropped_null']:,} with null keys dropped)"),
    ]
    for name in ("out_degree", "in_degree"):
        q = f[name]
        lines.append((name.replace("_", "-"), "  ".join(f"{k} {v:,.0f}" for k, v in q.items())))
    lines += [
        ("blocks", f"{b['count']:,} of {b['block_nodes']:,} nodes; edges per block min {b['edges_min']:,} "
                   f"median {b['edges_median']:,.0f} max {b['edges_max']:,}"),
        ("source ids", f["source_id_dtype"]),
        ("bytes on disk", f"{f['bytes_on_disk']:,}"),
    ]
    w = max(len(k) for k, _ in lines)
    for k, v in lines:
        print(f"{k:<{w}}  {v}")
