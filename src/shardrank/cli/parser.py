"""The argument parser: every command, option and help text of the CLI."""

from __future__ import annotations

import argparse

from .. import settings
from ..errors import EXIT_CODES
from ..solve.engine import ENGINES
from . import commands

EXIT_TABLE = "exit codes:\n" + "\n".join(f"  {k:<4} {v}" for k, v in EXIT_CODES.items())

DESCRIPTION = """\
Rank the nodes of very large directed graphs (PageRank), out of core.

A typical night:
  shardrank build edges/*.parquet --out crawl.store      # edge tables -> shard store
  shardrank rank crawl.store --out crawl.run             # PageRank with a guaranteed error bound
  shardrank top crawl.run -k 20                          # the highest scores, by your own keys

Run `shardrank demo` to see it all on an invented web crawl.
"""


class _Fmt(argparse.RawDescriptionHelpFormatter, argparse.ArgumentDefaultsHelpFormatter):
    """Keeps our examples' layout and shows real defaults (not "None" or "False")."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        if action.default in (None, False, [], argparse.SUPPRESS):
            return action.help
        return super()._get_help_string(action)


def _common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("output")
    g.add_argument("-q", "--quiet", action="store_true", help="print no progress (errors still go to stderr)")
    g.add_argument("--log-format", choices=("text", "json"), default="text",
                   help="progress and events on stderr: text for people, json (one object a line) for schedulers")


def _sub(sp: argparse._SubParsersAction, name: str, help: str, desc: str, func: object) -> argparse.ArgumentParser:  # type: ignore[type-arg]
    p = sp.add_parser(name, help=help, description=desc, formatter_class=_Fmt, epilog=EXIT_TABLE)
    p.set_defaults(func=func)
    return p


def _build_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "build", "turn edge tables into a shard store", """\
Read edge tables (Parquet files, directories - hive-partitioned too - or globs; CSV/TSV edge
lists, optionally .gz/.zst, '#' comments, with or without a header) through DuckDB, map keys
to dense ids, merge duplicate edges, and write a store of memory-mapped CSR shards.

Keys may be integers (ids in numeric order) or strings such as URLs (ids in lexicographic
order, so pages of one host sit together). Nodes that only appear as targets become dead ends.
Memory stays under --memory whatever the input size: DuckDB spills to a temporary directory
next to the store.

examples:
  shardrank build crawl/2026-12-01/ --out crawl.store
  shardrank build 'links/*.csv.gz' --src from_url --dst to_url --out links.store
  shardrank build cites.parquet --weight n --self-loops drop --memory 8GB --out cites.store
""", commands.cmd_build)
    p.add_argument("edges", nargs="+", metavar="EDGES", help="edge files, directories or glob patterns")
    p.add_argument("--out", required=True, metavar="STORE", help="the store directory to create")
    p.add_argument("--src", metavar="COL", help="source key column (default: 'src' if present, else the first column)")
    p.add_argument("--dst", metavar="COL", help="destination key column (default: 'dst' if present, else the second column)")
    p.add_argument("--weight", metavar="COL", help="edge weight column: positive finite numbers; duplicates are summed (default: unweighted)")
    p.add_argument("--nodes", metavar="FILE", action="append", default=[],
                   help="a table of extra node keys (column 'key' or the first); adds isolated nodes")
    p.add_argument("--self-loops", choices=("keep", "drop"), default="keep", help="keep or drop edges from a node to itself")
    p.add_argument("--header", choices=("auto", "yes", "no"), default="auto",
                   help="text inputs: does the first line name the columns? auto decides when it can "
                        "(text over numbers, or it names --src/--dst) and asks otherwise")
    p.add_argument("--drop-nulls", action="store_true", help="skip rows with a null key (they are counted) instead of failing")
    p.add_argument("--memory", metavar="SIZE", help="memory budget, e.g. 8GB or 40%% (default: 50%% of RAM)")
    p.add_argument("--threads", type=int, metavar="N", help="DuckDB threads (default: all cores)")
    p.add_argument("--block-nodes", type=int, default=settings.BLOCK_NODES, metavar="N",
                   help="destination ids per shard")
    p.add_argument("--id-width", choices=("auto", "16", "32", "64"), default="auto",
                   help="bits of a stored source id (auto: 32 below 2^32 nodes, else 64)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing STORE")
    _common(p)


def _patch_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "patch", "make a new store from a store plus added and removed edges", """\
Make a new store from an existing one and a delta: edge tables of links added (--add) and
links removed (--remove) since the store's snapshot. The old store is streamed block by
block, so a small delta costs far less than a full build, and the result is the store
`shardrank build` would write for the new edge set: the same ids, degrees and shards, byte
for byte (see docs/delta.md).

The new edge set is (old edges - removed) + added, each (src, dst) pair once, under the
store's --self-loops rule. Removing a link the store does not hold is counted, not an error;
a link both removed and added stays. A key left without any link disappears, keys of added
links appear, and ids stay in key order. Delta tables are read like build inputs (Parquet or
CSV, columns named like the store's --src/--dst); their keys must have the store's type.

Only unweighted stores built without --nodes can be patched (format version 2 or later).

examples:
  shardrank patch crawl.store --add delta/added.parquet --remove delta/removed.parquet --out crawl-2.store
  shardrank patch crawl.store --add 'new-links/*.csv' --out crawl-2.store
""", commands.cmd_patch)
    p.add_argument("store", metavar="STORE", help="the store to start from (left unchanged)")
    p.add_argument("--add", nargs="+", default=[], metavar="EDGES",
                   help="edge files, directories or glob patterns of links to add")
    p.add_argument("--remove", nargs="+", default=[], metavar="EDGES",
                   help="edge files, directories or glob patterns of links to remove")
    p.add_argument("--out", required=True, metavar="NEW_STORE", help="the store directory to create")
    p.add_argument("--src", metavar="COL", help="source key column of the delta tables (default: the store's)")
    p.add_argument("--dst", metavar="COL", help="destination key column of the delta tables (default: the store's)")
    p.add_argument("--threads", type=int, metavar="N", help="DuckDB threads reading the delta (default: all cores)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing NEW_STORE")
    _common(p)


def _rank_opts(p: argparse.ArgumentParser, defaults: bool = True) -> None:
    g = p.add_argument_group("what to compute")
    g.add_argument("--damping", type=float, default=settings.DAMPING if defaults else None,
                   help="probability of following a link (0 < d < 1; common range 0.8-0.9)")
    g.add_argument("--tol", type=float, default=settings.TOL if defaults else None,
                   help="guaranteed bound on the L1 distance between the result and the exact PageRank vector")
    g.add_argument("--max-iter", type=int, default=settings.MAX_ITER if defaults else None,
                   help="stop after this many iterations (exit 3 if tol was not reached; the run is saved)")
    g.add_argument("--method", choices=("power", "gauss-seidel"), default=settings.METHOD if defaults else None,
                   help="power iteration, or block Gauss-Seidel (uses each fresh block at once; fewer iterations, the default)")
    g.add_argument("--dead-ends", choices=("teleport", "uniform"), default=settings.DEAD_ENDS if defaults else None,
                   help="where a dead end's score goes: along the teleport vector, or spread uniformly")


def _rank_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "rank", "compute PageRank over a store", """\
Compute PageRank: the stationary distribution of a random surfer who follows a random
out-link with probability d (the damping factor) and otherwise teleports. A dead end (no
out-links) hands its whole score to the teleport distribution (or, with --dead-ends uniform,
to every node alike).

The run stops when the L1 distance to the exact answer is provably at most --tol, never on a
guess: every iteration bounds it from what it measured (for a power step the residual,
||x - x*||_1 <= d/(1-d) * ||Gx - x||_1; a Gauss-Seidel sweep bounds its own result the same
way from its change; see docs/guide.md). If --max-iter
comes first, the run is saved with its bound and the command exits 3.

Memory: three float64 vectors of N nodes (about 24 bytes a node) plus small buffers; the
shards are streamed memory-mapped, never loaded whole. Checkpoints are written about once a
minute; `shardrank resume RUN` continues a run that was interrupted.

examples:
  shardrank rank crawl.store --out crawl.run
  shardrank rank crawl.store --out seeded.run --teleport trusted-hosts.csv
  shardrank rank crawl.store --out tonight.run --init last-night.run --tol 1e-10
""", commands.cmd_rank)
    p.add_argument("store", metavar="STORE", help="a store made by `shardrank build`")
    p.add_argument("--out", required=True, metavar="RUN", help="the run directory to create")
    _rank_opts(p)
    g = p.add_argument_group("inputs by key")
    g.add_argument("--teleport", metavar="FILE", help="personalization table: key, weight (Parquet or CSV); normalised once")
    g.add_argument("--ignore-unknown-keys", action="store_true", help="skip --teleport keys the store does not have (reported)")
    g.add_argument("--init", metavar="RUN_OR_TABLE", help="warm start from an earlier run or a key, score table (changes speed, not the answer)")
    g = p.add_argument_group("execution")
    g.add_argument("--threads", type=int, metavar="N", help="kernel threads (results are identical for any N)")
    g.add_argument("--checkpoint-every", type=int, metavar="N", help="checkpoint every N iterations")
    g.add_argument("--checkpoint-seconds", type=float, default=settings.CHECKPOINT_SECONDS, metavar="S",
                   help="checkpoint every S seconds (when --checkpoint-every is not given)")
    g.add_argument("--engine", default="local", choices=tuple(ENGINES),
                   help="where the iteration runs: this process, or a Dask cluster (pip install 'shardrank[dask]')")
    g.add_argument("--scheduler", metavar="tcp://HOST:PORT",
                   help="dask: address of a running Dask scheduler (default: start --workers local processes)")
    g.add_argument("--workers", type=int, metavar="N",
                   help="dask without --scheduler: local worker processes (default: one per core)")
    g.add_argument("--exchange", metavar="DIR_OR_URL",
                   help="dask: shared directory or fsspec URL every worker can read, for the per-step "
                        "score vectors (default: RUN/exchange, so put RUN on shared storage)")
    g.add_argument("--overwrite", action="store_true", help="replace an existing RUN")
    _common(p)


def _resume_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "resume", "continue an interrupted rank run", """\
Continue a run from its newest checkpoint that verifies (falling back to the older one). The
result is bit for bit the one an uninterrupted run gives. Refuses if the store changed since
the run started, or if the options given here differ from the run's.

example:
  shardrank resume crawl.run
""", commands.cmd_resume)
    p.add_argument("run", metavar="RUN", help="the run directory of an interrupted `shardrank rank`")
    p.add_argument("--store", metavar="STORE", help="the store, if it moved since the run started")
    p.add_argument("--threads", type=int, metavar="N", help="kernel threads")
    p.add_argument("--scheduler", metavar="tcp://HOST:PORT",
                   help="a Dask run: the scheduler's address, if it changed since the run started")
    _rank_opts(p, defaults=False)
    _common(p)


def _inspect_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "inspect", "show facts about a store", """\
Show nodes, edges, dead ends, self-loops, merged duplicates, nodes without in-links, degree
quantiles, blocks and bytes on disk.

example:
  shardrank inspect crawl.store --json | jq .dead_ends
""", commands.cmd_inspect)
    p.add_argument("store", metavar="STORE")
    p.add_argument("--json", action="store_true", help="print JSON (nodes, edges, dead_ends, ... at the top level)")
    _common(p)


def _verify_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "verify", "check a store's checksums and invariants", """\
Read every byte of a store: checksums of every file, then the structure (offsets monotone,
ids in range, sources sorted, degrees equal to what the shards imply). Exit 0 when sound,
4 naming the damaged file.
""", commands.cmd_verify)
    p.add_argument("store", metavar="STORE")
    _common(p)


def _demo_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "demo", "run the whole job on an invented web crawl", """\
Invent a web crawl under the reserved .example domain (small: about 23,000 pages; medium:
about 175,000) with dead-end PDFs, a link farm that promotes one shop and a list of trusted
hosts. Build its store, rank it twice (uniform teleport, then teleport to the trusted hosts),
print the top pages of both, show what the seeded run demoted, and write DIR/report.html.
Takes seconds; everything it writes stays in DIR.

examples:
  shardrank demo
  shardrank demo --dir /tmp/demo --size medium
""", commands.cmd_demo)
    p.add_argument("--dir", default="shardrank-demo", metavar="DIR", help="where to put the demo's files")
    p.add_argument("--size", choices=("small", "medium"), default="small", help="how big a crawl to invent")
    _common(p)


def _refresh_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "refresh", "recompute and publish a new snapshot unattended (for schedulers)", """\
One scheduled recomputation in a home directory, safe to run from cron or a timer:

  1. lock HOME (a second refresh exits 75 at once: "try later")
  2. build a store generation from the snapshot (reused when the inputs did not change)
  3. rank it warm-started from the published run, by key, with checkpoints
     (an interrupted refresh resumes where it stopped on its next invocation)
  4. validate: converged within --tol, scores sum to 1, no NaN or negative score, node
     count as built; then the optional guards against the published run
  5. publish: HOME/current -> runs/gen-N, swapped atomically (readers use
     HOME/current/scores.parquet and never see a half-written run)
  6. keep the newest --keep generations (never the published one)
  7. print one JSON summary line on stdout (also RUN/refresh.json)

A run that fails validation or a guard is kept but not published (exit 3, 4 or 5).
See docs/nightly.md.

When the pipeline knows what changed, give the change instead of the whole snapshot:
--add and --remove edge tables patch the published store (same result as a refresh of the
whole new snapshot, less work; unweighted stores built without --nodes).

examples:
  shardrank refresh --edges crawl/2026-12-01/ --home /srv/rank
  shardrank refresh --edges 'links/*.parquet' --home /srv/rank --keep 3 --max-l1 0.2 --min-overlap 1000:0.8
  shardrank refresh --add changes/12-02/added.parquet --remove changes/12-02/removed.parquet --home /srv/rank
""", commands.cmd_refresh)
    p.add_argument("--edges", nargs="+", default=[], metavar="SOURCE", help="edge files, directories or glob patterns of tonight's snapshot")
    p.add_argument("--add", nargs="+", default=[], metavar="FILE",
                   help="instead of --edges: edge tables added since the published run (a delta; "
                   "the published store is patched instead of rebuilt, see docs/delta.md)")
    p.add_argument("--remove", nargs="+", default=[], metavar="FILE",
                   help="instead of --edges: edge tables removed since the published run")
    p.add_argument("--home", required=True, metavar="DIR", help="the refresh home: generations, the lock and the 'current' link live here")
    p.add_argument("--keep", type=int, default=settings.REFRESH_KEEP, metavar="N",
                   help="generations to keep (the published run and the store it uses are never removed)")
    g = p.add_argument_group("publishing guards (compared with the published run, by key)")
    g.add_argument("--max-l1", type=float, metavar="X", help="refuse to publish when the L1 distance to the published scores exceeds X (0..2)")
    g.add_argument("--min-overlap", metavar="K:F", help="refuse to publish when less than a fraction F of the top K stay in the top K")
    g = p.add_argument_group("how to read the snapshot (as for `shardrank build`)")
    g.add_argument("--src", metavar="COL", help="source key column")
    g.add_argument("--dst", metavar="COL", help="destination key column")
    g.add_argument("--weight", metavar="COL", help="edge weight column (unweighted when not given)")
    g.add_argument("--nodes", metavar="FILE", action="append", default=[], help="a table of extra node keys")
    g.add_argument("--self-loops", choices=("keep", "drop"), default="keep", help="keep or drop edges from a node to itself")
    g.add_argument("--header", choices=("auto", "yes", "no"), default="auto", help="text inputs: does the first line name the columns?")
    g.add_argument("--drop-nulls", action="store_true", help="skip rows with a null key instead of failing")
    g.add_argument("--memory", metavar="SIZE", help="memory budget of the build, e.g. 8GB or 40%% (when not given: 50%% of RAM)")
    g.add_argument("--block-nodes", type=int, default=settings.BLOCK_NODES, metavar="N", help="destination ids per shard")
    g.add_argument("--id-width", choices=("auto", "16", "32", "64"), default="auto", help="bits of a stored source id")
    _rank_opts(p)
    g = p.add_argument_group("execution")
    g.add_argument("--teleport", metavar="FILE", help="personalization table: key, weight")
    g.add_argument("--ignore-unknown-keys", action="store_true", help="skip --teleport keys the store does not have")
    g.add_argument("--threads", type=int, metavar="N", help="threads for the build and the kernels (results are identical for any N)")
    g.add_argument("--checkpoint-every", type=int, metavar="N", help="checkpoint every N iterations")
    g.add_argument("--checkpoint-seconds", type=float, default=settings.CHECKPOINT_SECONDS, metavar="S",
                   help="checkpoint every S seconds (when --checkpoint-every is not given)")
    _common(p)


def _top_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "top", "show the highest scores of a run, by key", """\
Show the k highest scores of a run with their position (1 = highest; equal scores in key
order), score, score x N (how many times the uniform share 1/N), in-degree and out-degree.
With --match, show the highest-scored keys that match a pattern, with their positions in
the whole run.

examples:
  shardrank top crawl.run
  shardrank top crawl.run -k 100 --match 'https://*.example/'
  shardrank top crawl.run --match miracle-gadget --json
""", commands.cmd_top)
    p.add_argument("run", metavar="RUN", help="a run directory made by `shardrank rank`")
    p.add_argument("-k", type=int, default=settings.TOP_K, metavar="K", help="how many rows")
    p.add_argument("--match", metavar="PATTERN",
                   help="only keys matching PATTERN: * any text, ? one character, [abc] one of a set "
                        "(case-sensitive); without wildcards, keys containing PATTERN")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--json", action="store_true", help="print a JSON list of objects (position, key, score, ...)")
    g.add_argument("--csv", action="store_true", help="print CSV (keys made safe for spreadsheets, see docs/guide.md)")
    p.add_argument("--store", metavar="STORE", help="the run's store, if it moved (degrees are read from it)")
    _common(p)


def _export_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "export", "write a run's scores by key to Parquet or CSV", """\
Write every node of a run as one table, highest score first: position (1 = highest; equal
scores in key order), key, score, in_degree, out_degree. The file name picks the format:
.parquet, .csv or .csv.gz.

CSV is safe to open in a spreadsheet: a key that begins with = + - @, a tab or a carriage
return (or an apostrophe) gets one apostrophe in front so it cannot run as a formula; drop a
leading apostrophe to recover the key. Parquet keeps the exact keys.

examples:
  shardrank export crawl.run --out scores.parquet
  duckdb -c "SELECT * FROM 'scores.parquet' WHERE key LIKE '%.example/%' LIMIT 10"
""", commands.cmd_export)
    p.add_argument("run", metavar="RUN", help="a run directory made by `shardrank rank`")
    p.add_argument("--out", required=True, metavar="FILE", help="the file to write (.parquet, .csv or .csv.gz)")
    p.add_argument("--store", metavar="STORE", help="the run's store, if it moved (degrees are read from it)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing FILE")
    _common(p)


def _compare_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "compare", "what changed between two runs, joined by key", """\
Join two runs by key and measure how far apart they are: the L1 distance of the score
vectors (a key one run lacks counts as 0 there; at most 2), Kendall tau and Spearman rho of
the scores over the union of both top-k, the share of the top 10, 100 and 1000 that both
runs share, the keys that rose and fell most within that union, and how many keys are new
in RUN_B or vanished from RUN_A. Memory stays bounded: DuckDB does the join on disk.

examples:
  shardrank compare last-night.run tonight.run
  shardrank compare last-night.run tonight.run -k 100 --json | jq .overlap
""", commands.cmd_compare)
    p.add_argument("run_a", metavar="RUN_A", help="the earlier (baseline) run")
    p.add_argument("run_b", metavar="RUN_B", help="the later run")
    p.add_argument("-k", type=int, default=settings.COMPARE_K, metavar="K",
                   help="top-k whose union feeds the rank correlations and the risers and fallers")
    p.add_argument("--json", action="store_true", help="print the whole comparison as one JSON object")
    _common(p)


def _report_cmd(sp: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = _sub(sp, "report", "write a one-file HTML report of a run", """\
Write one self-contained HTML file (plots inline, no network, no scripts) that reads well on
a phone and prints cleanly: graph facts, run options, convergence, the score distribution,
the top keys, and with --against a comparison with a baseline run including a plot of each
key's position in both runs.

examples:
  shardrank report crawl.run --out crawl.html
  shardrank report tonight.run --against last-night.run --out tonight.html
""", commands.cmd_report)
    p.add_argument("run", metavar="RUN", help="a run directory made by `shardrank rank`")
    p.add_argument("--out", required=True, metavar="FILE", help="the HTML file to write")
    p.add_argument("--against", metavar="RUN_B", help="a baseline run to compare with, by key")
    p.add_argument("-k", type=int, default=settings.TOP_K, metavar="K", help="rows of the top table")
    p.add_argument("--compare-k", type=int, default=settings.COMPARE_K, metavar="K",
                   help="with --against: the top-k whose union is compared")
    p.add_argument("--store", metavar="STORE", help="the run's store, if it moved")
    _common(p)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="shardrank", description=DESCRIPTION, formatter_class=_Fmt, epilog=EXIT_TABLE)
    from .. import __version__

    p.add_argument("--version", action="version", version=f"shardrank {__version__}")
    sp = p.add_subparsers(title="commands", metavar="COMMAND")
    for add in (_demo_cmd, _build_cmd, _patch_cmd, _inspect_cmd, _verify_cmd, _rank_cmd, _resume_cmd, _refresh_cmd, _top_cmd, _export_cmd, _compare_cmd, _report_cmd):
        add(sp)
    return p
