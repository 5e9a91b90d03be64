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
    if len(b.get("sizes", [])) <= 8:  # a few blocks: one line each; many: the summary above
        for s in b.get("sizes", []):
            last = s["first_node"] + s["nodes"] - 1
            lines.append((f"  block {s['index']}", f"ids {s['first_node']:,}..{last:,}: {s['edges']:,} edges, "
                                                  f"{s['bytes']:,} bytes"))
    w = max(len(k) for k, _ in lines)
    for k, v in lines:
        print(f"{k:<{w}}  {v}")


def print_top_rows(rows: list[dict[str, Any]]) -> None:
    """The table of `shardrank top`: position, score, x N, degrees, key (keys escaped)."""
    deg = bool(rows) and "in_degree" in rows[0]
    head = f"{'#':>8}  {'score':>12}  {'x N':>9}"
    head += f"  {'in':>9}  {'out':>7}" if deg else ""
    print(head + "  key")
    for r in rows:
        line = f"{r['position']:>8,}  {r['score']:12.6e}  {r['score_x_n']:9.2f}"
        line += f"  {r['in_degree']:>9,}  {r['out_degree']:>7,}" if deg else ""
        print(f"{line}  {safe_text(r['key'], 100)}")
    if not rows:
        print("(no key matches)")


def write_csv_rows(rows: list[dict[str, Any]], out: Any) -> None:
    """Rows as CSV on ``out``, keys made safe for spreadsheets (as `shardrank export` does)."""
    import csv

    from ..results.export import spreadsheet_safe

    if not rows:
        out.write("position,key,score,score_x_n,in_degree,out_degree\n")
        return
    w = csv.DictWriter(out, fieldnames=list(rows[0]), lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({**r, "key": spreadsheet_safe(r["key"]), "score": repr(r["score"])})


def print_comparison(s: dict[str, Any]) -> None:
    """The summary of `shardrank compare` for people."""
    tau, rho = s["kendall_tau"], s["spearman_rho"]
    ov = "  ".join(f"top {k} {v:.1%}" for k, v in s["overlap"].items())
    print(f"A: {safe_text(s['a'])} ({s['n_a']:,} keys)")
    print(f"B: {safe_text(s['b'])} ({s['n_b']:,} keys)")
    print(f"keys:         {s['common_keys']:,} in both, {s['new_keys']:,} new in B, "
          f"{s['vanished_keys']:,} vanished from A")
    print(f"L1 distance:  {s['l1']:.4e} (0 = identical, 2 = disjoint); "
          f"largest single change {s['max_abs_diff']:.3e}")
    print(f"overlap:      {ov}")
    tau_s = "n/a" if tau is None else f"{tau:.4f}"
    rho_s = "n/a" if rho is None else f"{rho:.4f}"
    print(f"over the union of both top {s['k']:,} ({s['union_top_k']:,} keys): "
          f"Kendall tau {tau_s}, Spearman rho {rho_s}")
    for title, key in (("biggest risers", "risers"), ("biggest fallers", "fallers")):
        rows = s[key][:10]
        print(f"{title} (position in A -> B):" if rows else f"{title}: none")
        for r in rows:
            d = r["position_a"] - r["position_b"]
            moved = f"{r['position_a']:>9,} -> {r['position_b']:<9,}"
            print(f"  {d:>+9,}  {moved}  {safe_text(r['key'], 90)}")
    new = s["new_in_top_k"]
    if new:
        more = "+" if len(new) >= 20 else ""
        example = safe_text(new[0]["key"], 90)
        print(f"new keys in B's top {s['k']:,}: {len(new)}{more}, e.g. {example}")
