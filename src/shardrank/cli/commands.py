"""One function per command: turn parsed arguments into an API call and print the outcome."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from .. import api
from ..errors import NotConvergedError
from ..ingest.build import BuildOptions
from ..progress import Reporter
from ..solve.options import RankOptions
from .format import print_facts, print_top


def cmd_build(a: argparse.Namespace, rep: Reporter) -> int:
    o = BuildOptions(
        src=a.src, dst=a.dst, weight=a.weight, nodes=a.nodes, self_loops=a.self_loops, header=a.header,
        drop_nulls=a.drop_nulls, memory=a.memory, threads=a.threads, block_nodes=a.block_nodes,
        id_width=a.id_width if a.id_width == "auto" else int(a.id_width), overwrite=a.overwrite,
    )
    m = api.build_store(a.edges, a.out, o, rep)
    c = m.counts
    if not a.quiet and a.log_format == "text":
        print(f"{a.out}: {m.n_nodes:,} nodes, {m.n_edges:,} edges in {len(m.blocks)} blocks; "
              f"{c.get('dead_ends', 0):,} dead ends, {c.get('duplicates_merged', 0):,} duplicates merged, "
              f"{c.get('self_loops', 0):,} self-loops kept, {c.get('rows_dropped_null', 0):,} null rows dropped")
    return 0


def cmd_patch(a: argparse.Namespace, rep: Reporter) -> int:
    m = api.patch_store(a.store, a.out, add=a.add, remove=a.remove, overwrite=a.overwrite, reporter=rep,
                        src=a.src, dst=a.dst, threads=a.threads)
    c = m.counts
    if not a.quiet and a.log_format == "text":
        print(f"{a.out}: {m.n_nodes:,} nodes, {m.n_edges:,} edges in {len(m.blocks)} blocks; "
              f"{c['edges_added']:,} edges added, {c['edges_removed']:,} removed, "
              f"{c['removals_absent']:,} removals not in the store, {c['nodes_added']:,} nodes added, "
              f"{c['nodes_vanished']:,} vanished")
    return 0


def cmd_inspect(a: argparse.Namespace, rep: Reporter) -> int:
    facts = api.inspect_store(a.store)
    if a.json:
        print(json.dumps(facts, indent=2))
    else:
        print_facts(facts)
    return 0


def cmd_verify(a: argparse.Namespace, rep: Reporter) -> int:
    reader = api.open_store(a.store)

    def prog(name: str, i: int, n: int) -> None:
        rep.progress("verifying", i + 1, n, "files")

    info = api.verify_store(reader, prog)
    rep.done()
    if not a.quiet:
        print(f"{a.store}: sound ({info['files']} files, {info['blocks']} blocks, {info['bytes']:,} bytes checked)")
    return 0


def _rank_options(a: argparse.Namespace) -> RankOptions:
    return RankOptions(
        damping=a.damping, tol=a.tol, max_iter=a.max_iter, method=a.method, dead_ends=a.dead_ends,
        teleport=a.teleport, ignore_unknown_keys=a.ignore_unknown_keys, init=a.init, threads=a.threads,
        checkpoint_every=a.checkpoint_every, checkpoint_seconds=a.checkpoint_seconds, engine=a.engine,
        scheduler=a.scheduler, workers=a.workers, exchange=a.exchange,
    )


def _finish(res: api.RankResult, a: argparse.Namespace, rep: Reporter) -> int:
    if not a.quiet and a.log_format == "text":
        print_top(res.top(10), res.n_nodes, title=f"top 10 of {res.n_nodes:,} nodes")
    if not res.converged:
        e = NotConvergedError(
            f"not converged: after {res.iterations} iterations the L1 error bound is {res.error_bound:.3e} "
            f"> tol {res.summary['tol']:g}; the run is saved in {res.run_dir}",
            hint="rank again with a larger --max-iter and --init RUN (warm start), or a looser --tol",
        )
        raise e
    return 0


def cmd_rank(a: argparse.Namespace, rep: Reporter) -> int:
    res = api.rank(a.store, a.out, _rank_options(a), rep, overwrite=a.overwrite)
    return _finish(res, a, rep)


def cmd_resume(a: argparse.Namespace, rep: Reporter) -> int:
    given: dict[str, Any] = {k: getattr(a, k) for k in ("damping", "tol", "max_iter", "method", "dead_ends")}
    expect = None
    if any(v is not None for v in given.values()):
        from pathlib import Path

        from ..results.result import read_run_json

        doc = read_run_json(Path(a.run))
        base = {k: doc["options"][k] for k in given}
        base.update({k: v for k, v in given.items() if v is not None})
        expect = RankOptions(**base)
    res = api.resume(a.run, rep, store=a.store, threads=a.threads, expect=expect, scheduler=a.scheduler)
    a.overwrite = False
    return _finish(res, a, rep)


def cmd_refresh(a: argparse.Namespace, rep: Reporter) -> int:
    from ..refresh import RefreshOptions
    from ..refresh.checks import parse_overlap_guard

    o = RefreshOptions(
        build=BuildOptions(
            src=a.src, dst=a.dst, weight=a.weight, nodes=a.nodes, self_loops=a.self_loops, header=a.header,
            drop_nulls=a.drop_nulls, memory=a.memory, threads=a.threads, block_nodes=a.block_nodes,
            id_width=a.id_width if a.id_width == "auto" else int(a.id_width)),
        rank=RankOptions(
            damping=a.damping, tol=a.tol, max_iter=a.max_iter, method=a.method, dead_ends=a.dead_ends,
            teleport=a.teleport, ignore_unknown_keys=a.ignore_unknown_keys, threads=a.threads,
            checkpoint_every=a.checkpoint_every, checkpoint_seconds=a.checkpoint_seconds),
        keep=a.keep, max_l1=a.max_l1,
        min_overlap=parse_overlap_guard(a.min_overlap) if a.min_overlap else None,
    )

    def print_summary(summary: dict[str, Any]) -> None:
        # one line on stdout, also when the result is refused (the error follows on stderr)
        print(json.dumps(summary, default=str), flush=True)

    api.refresh(a.edges, a.home, o, rep, on_summary=print_summary, add=a.add, remove=a.remove)
    return 0


def cmd_demo(a: argparse.Namespace, rep: Reporter) -> int:
    from ..demo import run_demo

    return run_demo(a.dir, a.size, rep, quiet=a.quiet, out=sys.stdout)


def cmd_top(a: argparse.Namespace, rep: Reporter) -> int:
    from ..results.top import top_rows
    from .format import print_top_rows, write_csv_rows

    rows = top_rows(a.run, a.k, match=a.match, store=a.store)
    if a.json:
        print(json.dumps(rows, indent=2))
    elif a.csv:
        write_csv_rows(rows, sys.stdout)
    else:
        print_top_rows(rows)
    return 0


def cmd_export(a: argparse.Namespace, rep: Reporter) -> int:
    from ..results.export import export_run

    info = export_run(a.run, a.out, store=a.store, overwrite=a.overwrite)
    if not a.quiet and a.log_format == "text":
        extra = f"; {info['escaped_keys']:,} keys prefixed with ' for spreadsheets" if info["escaped_keys"] else ""
        print(f"{info['path']}: {info['rows']:,} rows ({info['format']}){extra}")
    return 0


def cmd_compare(a: argparse.Namespace, rep: Reporter) -> int:
    from ..results.compare import compare_runs
    from .format import print_comparison

    summary = compare_runs(a.run_a, a.run_b, a.k)
    if a.json:
        print(json.dumps(summary, indent=2))
    else:
        print_comparison(summary)
    return 0


def cmd_report(a: argparse.Namespace, rep: Reporter) -> int:
    from ..report import write_report

    out = write_report(a.run, a.out, against=a.against, k=a.k, compare_k=a.compare_k, store=a.store)
    if not a.quiet and a.log_format == "text":
        print(f"wrote {out}")
    return 0
