"""HTML pieces of the report: the stylesheet and small builders that escape every value.

Every function here takes plain values and returns markup; any text that is not our own
(keys, paths, option values) goes through :func:`text`, which escapes HTML and shows control
characters visibly (a newline inside a key appears as ``\\n``).
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence
from typing import Any

from . import palette

# No network, no scripts: even a markup mistake cannot load or run anything.
CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"

CSS = f"""
:root {{ --ink: {palette.INK}; --muted: {palette.MUTED}; --rule: {palette.RULE}; --grid: {palette.GRID};
  --paper: {palette.PAPER}; --shade: {palette.SHADE}; --a: {palette.LINE_A}; --b: {palette.LINE_B}; }}
* {{ box-sizing: border-box; }}
html {{ -webkit-text-size-adjust: 100%; text-size-adjust: 100%; }}
body {{ margin: 0; background: var(--paper); color: var(--ink);
  font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "DejaVu Sans", sans-serif; }}
.wrap {{ max-width: 60rem; margin: 0 auto; padding: 0 1rem 3rem; }}
.masthead {{ border-bottom: 3px double var(--rule); padding: 1.6rem 0 1rem; }}
.kicker {{ margin: 0; font-size: .72rem; letter-spacing: .14em; text-transform: uppercase; color: var(--muted); }}
h1 {{ margin: .15rem 0 .5rem; font-size: 1.55rem; line-height: 1.25; overflow-wrap: anywhere; }}
.verdict {{ margin: 0 0 .5rem; padding: .3rem .7rem; border-left: 4px solid var(--a); background: var(--shade); }}
.verdict.warn {{ border-left-color: var(--b); }}
.meta {{ margin: 0; font-size: .82rem; color: var(--muted); overflow-wrap: anywhere; }}
nav.toc {{ margin: .8rem 0 0; font-size: .85rem; }}
nav.toc a {{ color: var(--a); text-decoration: none; margin-right: 1rem; white-space: nowrap; }}
h2 {{ margin: 2.2rem 0 .7rem; padding-bottom: .25rem; font-size: 1.15rem; border-bottom: 1px solid var(--rule); }}
h2 .no {{ color: var(--b); margin-right: .55rem; font-variant-numeric: tabular-nums; }}
h3 {{ margin: 1.4rem 0 .4rem; font-size: 1rem; }}
p.note {{ margin: .3rem 0 .8rem; color: var(--muted); font-size: .88rem; }}
dl.facts {{ display: grid; grid-template-columns: repeat(auto-fill, minmax(17rem, 1fr));
  gap: 0 2rem; margin: 0; }}
dl.facts > div {{ display: flex; justify-content: space-between; align-items: baseline; gap: 1rem;
  padding: .22rem 0; border-bottom: 1px dotted var(--rule); }}
dt {{ flex: 1 1 auto; color: var(--muted); }}
dd {{ flex: 0 1 auto; max-width: 72%; margin: 0; text-align: right; font-variant-numeric: tabular-nums;
  overflow-wrap: anywhere; min-width: 0; }}
figure {{ margin: .4rem 0 1.2rem; }}
svg.plot {{ display: block; width: 100%; height: auto; max-width: 44rem; }}
figcaption {{ margin-top: .3rem; font-size: .85rem; color: var(--muted); max-width: 44rem; }}
.scroll {{ overflow-x: auto; }}
table {{ width: 100%; border-collapse: collapse; font-size: .88rem; }}
th {{ padding: .35rem .5rem; text-align: left; font-weight: 600; border-bottom: 2px solid var(--ink);
  white-space: nowrap; }}
td {{ padding: .28rem .5rem; border-bottom: 1px solid var(--grid); vertical-align: top; }}
tbody tr:nth-child(even) {{ background: var(--shade); }}
.n {{ text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }}
td.key {{ min-width: 12rem; overflow-wrap: anywhere; word-break: break-word;
  font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, "DejaVu Sans Mono", monospace; font-size: .82rem; }}
.nw {{ white-space: nowrap; }}
.up {{ color: var(--a); }} .down {{ color: var(--b); }}
footer {{ margin-top: 2.5rem; padding-top: .6rem; border-top: 1px solid var(--rule); font-size: .8rem;
  color: var(--muted); overflow-wrap: anywhere; }}
@media (max-width: 40rem) {{
  body {{ font-size: 14px; }}
  .wrap {{ padding: 0 .7rem 2rem; }}
  h1 {{ font-size: 1.3rem; }}
  dl.facts {{ grid-template-columns: 1fr; }}
  td.key {{ min-width: 9rem; }}
}}
@media print {{
  @page {{ margin: 14mm; }}
  body {{ background: #fff; font-size: 9.5pt; }}
  .wrap {{ max-width: none; padding: 0; }}
  nav.toc {{ display: none; }}
  .verdict, tbody tr:nth-child(even) {{ -webkit-print-color-adjust: exact; print-color-adjust: exact; }}
  figure, tr, dl.facts > div {{ break-inside: avoid; }}
  h2, h3 {{ break-after: avoid; }}
  .scroll {{ overflow: visible; }}
}}
"""  # noqa: E501 (CSS reads better one rule a line)


def visible(value: Any) -> str:
    """``str(value)`` with control characters written as escapes (``\\n``, ``\\x1b``...)."""
    t = str(value)
    if any(ord(c) < 32 or 127 <= ord(c) < 160 or c in "\u2028\u2029" for c in t):
        t = "".join(
            c
            if not (ord(c) < 32 or 127 <= ord(c) < 160 or c in "\u2028\u2029")
            else c.encode("unicode_escape").decode("ascii")
            for c in t
        )
    return t


def text(value: Any) -> str:
    """Escape untrusted text for HTML; control characters shown as escapes."""
    return html.escape(visible(value), quote=True)


def num(x: float | int | None, fmt: str = ",") -> str:
    if x is None:
        return "–"
    return format(x, fmt)


def _keep_whole(v: str) -> str:
    """Short one-word values (numbers such as 1.5e-01) must not break at their hyphen."""
    return f'<span class="nw">{v}</span>' if " " not in v and len(v) <= 24 else v


def facts(items: Iterable[tuple[str, str]]) -> str:
    """A definition list of (label, already-escaped value) pairs."""
    rows = "".join(
        f"<div><dt>{html.escape(k)}</dt><dd>{_keep_whole(v)}</dd></div>" for k, v in items
    )
    return f'<dl class="facts">{rows}</dl>'


def table(head: Sequence[tuple[str, str]], rows: Iterable[Sequence[str]]) -> str:
    """A table; ``head`` is (title, css class) pairs, cells are already-escaped markup."""
    th = "".join(f'<th class="{c}" scope="col">{html.escape(t)}</th>' for t, c in head)
    body = "".join(
        "<tr>"
        + "".join(f'<td class="{c}">{cell}</td>' for (_, c), cell in zip(head, r, strict=True))
        + "</tr>"
        for r in rows
    )
    table = f"<table><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>"
    return f'<div class="scroll">{table}</div>'


def figure(svg: str, caption: str) -> str:
    """A plot (our own SVG) with a caption (our own words, escaped)."""
    return f"<figure>{svg}<figcaption>{html.escape(caption)}</figcaption></figure>"


def section(no: int, anchor: str, title: str, body: str) -> str:
    return (
        f'<section id="{anchor}"><h2><span class="no">{no}</span>{html.escape(title)}</h2>'
        f"{body}</section>"
    )


def document(
    title: str, head: str, toc: Sequence[tuple[str, str]], sections: Sequence[str], footer: str
) -> str:
    """The whole page. ``title`` is untrusted; ``head``, ``sections``, ``footer`` are markup."""
    nav = " ".join(f'<a href="#{a}">{html.escape(t)}</a>' for a, t in toc)  # spaces: lines may wrap
    return (
        "<!doctype html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">'
        f"<title>{text(title)}</title><style>{CSS}</style></head>"
        f'<body><div class="wrap"><header class="masthead">{head}'
        f'<nav class="toc">{nav}</nav></header>'
        f"<main>{''.join(sections)}</main><footer>{footer}</footer></div></body></html>\n"
    )
