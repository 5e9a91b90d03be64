"""The counting-sort build path for integer keys (numba), bounded in memory.

DuckDB still reads and validates every input (``build._validate_and_stage``). For integer keys
whose range ``lo..hi`` fits a direct table, this path then replaces DuckDB's join, GROUP BY
and ORDER BY, which dominate a SQL build:

1. scatter: stream (src, dst) batches out of DuckDB; mark every key present in a byte table;
   drop self-loops if asked; append each edge, as its two key offsets packed in a uint64, to
   the spill file of its destination key range (a counting sort of each batch: count, prefix
   sum, scatter).
2. ids: a running count over the presence table gives every key its id in numeric key order,
   the ids the SQL path gives.
3. sort: for consecutive key ranges holding at most ``cap`` edges (the memory bound), turn
   each edge into ``dst_id << 32 | src_id`` in place, sort, drop duplicates, count degrees,
   and append the source ids (uint32) to one spill file, in (dst, src) order.
4. write: with every in-degree known, stream the sources (and destinations rebuilt from the
   in-degrees) into the StoreWriter.

The result does not depend on batch order or thread count: step 3 sorts each range into the
one canonical order. Weighted edges and ``--nodes`` tables take the SQL path.
"""

from __future__ import annotations

import math
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import duckdb
import numba
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .. import settings
from ..errors import ShardrankError
from ..kernels.partition import dedupe_sorted, number_keys, pack_edges, scatter_batch
from ..progress import Reporter
from ..store import layout
from ..store.writer import StoreWriter
from .sources import InputFile
from .tables import Columns, arrow_reader, sql_str

MAX_SPILL_FILES = 256  # destination key ranges written in the scatter pass (open files)
RESERVE_BYTES = 384 * 2**20  # interpreter, DuckDB's streaming buffers, one Arrow batch
# while sorting: the edge as one uint64 (packed in place) + its uint32 source out
BYTES_PER_EDGE = 12
# presence (1) + id (4) per key of the range; degrees and their running sum (24) per node
BYTES_PER_KEY = 29
SORT_GROUP_EDGES = 1 << 25  # edges sorted at once at most (256 MiB): one buffer, reused
MIN_CAP_EDGES = 1 << 20  # a budget that cannot sort this many edges at once takes the SQL path
MIN_EDGES_PER_SPILL = 1 << 16  # small inputs get few spill files


@dataclass(frozen=True)
class IntPlan:
    """Key range and memory split of a counting-sort build."""

    lo: int  # smallest key
    span: int  # hi - lo + 1 (keys are stored as uint32 offsets from lo)
    n_rows: int  # rows DuckDB will stream (after nulls are dropped)
    cap_edges: int  # edges sorted at once
    memory: int  # the build's budget in bytes


# --- planning -------------------------------------------------------------------------------
def _stats_range(
    con: duckdb.DuckDBPyConnection, files: list[InputFile], cols: Columns
) -> tuple[int, int] | None:
    """Key range from Parquet footer statistics (no scan); None if any file lacks them."""
    if any(f.kind != "parquet" for f in files):
        return None
    lst = ", ".join(sql_str(str(f.path)) for f in files)
    try:
        rows = con.execute(
            "SELECT path_in_schema, count(*), count(TRY_CAST(stats_min_value AS BIGINT)), "
            "count(TRY_CAST(stats_max_value AS BIGINT)), min(TRY_CAST(stats_min_value AS BIGINT)), "
            f"max(TRY_CAST(stats_max_value AS BIGINT)) FROM parquet_metadata([{lst}]) "
            f"WHERE path_in_schema IN ({sql_str(cols.src)}, {sql_str(cols.dst)}) GROUP BY ALL"
        ).fetchall()
        n_groups = con.execute(
            f"SELECT count(DISTINCT (file_name, row_group_id)) FROM parquet_metadata([{lst}])"
        ).fetchall()[0][0]
    except duckdb.Error:
        return None
    if len(rows) != (1 if cols.src == cols.dst else 2):
        return None
    if any(r[1] != n_groups or r[2] != n_groups or r[3] != n_groups for r in rows):
        return None
    return min(int(r[4]) for r in rows), max(int(r[5]) for r in rows)


def _scan_range(con: duckdb.DuckDBPyConnection) -> tuple[int, int]:
    row = con.execute("SELECT min(s), max(s), min(d), max(d) FROM clean").fetchall()[0]
    return min(int(row[0]), int(row[2])), max(int(row[1]), int(row[3]))


def _plan_for(lo: int, hi: int, n_rows: int, memory: int) -> IntPlan | None:
    span = hi - lo + 1
    if span > 2**32:
        return None
    fixed = BYTES_PER_KEY * span + RESERVE_BYTES  # N <= span
    if fixed + BYTES_PER_EDGE * MIN_CAP_EDGES > memory:
        return None  # the direct tables do not fit the budget: the SQL path spills instead
    cap = (memory - fixed) // BYTES_PER_EDGE
    return IntPlan(lo=lo, span=span, n_rows=n_rows, cap_edges=int(cap), memory=memory)


def plan_integer_build(
    con: duckdb.DuckDBPyConnection,
    files: list[InputFile],
    cols: Columns,
    n_rows: int,
    memory: int,
    weighted: bool,
    has_node_files: bool,
) -> IntPlan | None:
    """A plan for the counting-sort path, or None when the SQL path must build the store."""
    if cols.key_type != "int64" or weighted or has_node_files or n_rows == 0:
        return None
    rng = _stats_range(con, files, cols) or _scan_range(con)
    return _plan_for(rng[0], rng[1], n_rows, memory)


# --- the build ------------------------------------------------------------------------------
class _OutOfRange(Exception):
    """A key outside the planned range (footer statistics were not tight)."""


def _shift_for(span: int, n_parts: int) -> int:
    return max(0, math.ceil(math.log2(max(span, 1) / n_parts)))


def _scatter(
    con: duckdb.DuckDBPyConnection,
    plan: IntPlan,
    spill: Path,
    drop_loops: bool,
    present: np.ndarray,
    rep: Reporter,
) -> tuple[list[Path], list[int], int]:
    """Pass over the edges: presence, and spill files by destination range. Returns the files,
    their edge counts and the shift that defines their ranges."""
    # about four ranges per sort group, so groups come out even when keys are skewed
    group = min(plan.cap_edges, SORT_GROUP_EDGES)
    want = max(
        1,
        min(
            MAX_SPILL_FILES, 4 * math.ceil(plan.n_rows / group), plan.n_rows // MIN_EDGES_PER_SPILL
        ),
    )
    shift = _shift_for(plan.span, want)
    n_parts = ((plan.span - 1) >> shift) + 1
    paths = [spill / f"range-{p:04d}.u64" for p in range(n_parts)]
    sizes = [0] * n_parts
    files = [open(p, "wb") for p in paths]
    done = 0
    try:
        buf = np.empty(0, dtype=np.uint64)
        for batch in arrow_reader(con, "SELECT s, d FROM clean", settings.BATCH_ROWS):
            s = batch.column(0).to_numpy()
            d = batch.column(1).to_numpy()
            if buf.shape[0] < s.shape[0]:
                buf = np.empty(s.shape[0], dtype=np.uint64)
            starts = scatter_batch(
                s, d, plan.lo, plan.span, shift, n_parts, drop_loops, present, buf
            )
            if starts.shape[0] == 0:
                raise _OutOfRange
            for p in np.flatnonzero(np.diff(starts)).tolist():
                a, b = int(starts[p]), int(starts[p + 1])
                files[p].write(buf[a:b].data.cast("B"))
                sizes[p] += b - a
            done += s.shape[0]
            rep.progress("partitioning edges", done, plan.n_rows, "edges")
    finally:
        for f in files:
            f.close()
    return paths, sizes, shift


def _groups(sizes: list[int], cap: int) -> list[list[int]]:
    """Consecutive ranges whose edges fit ``cap`` together (a range over ``cap`` stands alone)."""
    out: list[list[int]] = []
    cur: list[int] = []
    total = 0
    for p, n in enumerate(sizes):
        if n == 0:
            continue
        if cur and total + n > cap:
            out.append(cur)
            cur, total = [], 0
        cur.append(p)
        total += n
    if cur:
        out.append(cur)
    return out


def _read_pairs(paths: list[Path], sizes: list[int], buf: np.ndarray) -> np.ndarray:
    """Read the spill files into the front of ``buf`` (uint64, one pair per item); delete them."""
    pos = 0
    for path, n in zip(paths, sizes, strict=True):
        with open(path, "rb") as f:
            got = f.readinto(buf[pos : pos + n].data.cast("B"))
        if got != 8 * n:
            raise ShardrankError(f"internal error: {path} holds {got} bytes, expected {8 * n}")
        pos += n
        path.unlink()
    return buf[:pos]


def _sort_ranges(
    paths: list[Path],
    sizes: list[int],
    ids: np.ndarray,
    cap: int,
    sources_path: Path,
    in_deg: np.ndarray,
    out_deg: np.ndarray,
    rep: Reporter,
) -> tuple[int, int]:
    """Sort and deduplicate range groups in order; append their source ids (uint32) to
    ``sources_path`` (the destinations follow from the in-degrees). Returns (edges, self-loops)."""
    groups = _groups(sizes, min(cap, SORT_GROUP_EDGES))
    # one buffer for every group: small is cache-friendly, and fresh memory is slow to touch on VMs
    most = max((sum(sizes[p] for p in g) for g in groups), default=0)
    buf = np.empty(most, dtype=np.uint64)
    src = np.empty(most, dtype=np.uint32)
    n_edges = n_loops = 0
    with open(sources_path, "wb") as out:
        for g, members in enumerate(groups):
            keys = _read_pairs([paths[p] for p in members], [sizes[p] for p in members], buf)
            pack_edges(keys, ids)
            keys.sort()
            n, loops = dedupe_sorted(keys, in_deg, out_deg, src)
            out.write(src[:n].data.cast("B"))
            n_edges += int(n)
            n_loops += int(loops)
            rep.progress("sorting and merging duplicates", g + 1, len(groups), "ranges")
    return n_edges, n_loops


def _write_nodes(path: Path, present: np.ndarray, lo: int, n: int) -> None:
    """nodes.parquet: id, key (int64) in id order, in bounded row groups."""
    keys = np.flatnonzero(present).astype(np.int64)
    keys += lo
    schema = pa.schema([("id", pa.int64()), ("key", pa.int64())])
    step = settings.BATCH_ROWS
    with pq.ParquetWriter(path, schema, compression="zstd") as w:
        for a in range(0, n, step):
            b = min(a + step, n)
            w.write_table(
                pa.table(
                    [pa.array(np.arange(a, b, dtype=np.int64)), pa.array(keys[a:b])], schema=schema
                ),
                row_group_size=step,
            )


def _stream_sorted(
    path: Path, w: StoreWriter, in_deg: np.ndarray, n_edges: int, rep: Reporter
) -> None:
    """Feed the writer batches of (dst, src): sources from ``path``, destinations rebuilt from
    the in-degrees (row r owns edges ``ends[r] - in_deg[r] .. ends[r] - 1``)."""
    ends = np.cumsum(in_deg)
    step = settings.BATCH_ROWS
    with open(path, "rb") as f:
        for e0 in range(0, n_edges, step):
            e1 = min(e0 + step, n_edges)
            src = np.fromfile(f, dtype=np.uint32, count=e1 - e0)
            if src.shape[0] != e1 - e0:
                raise ShardrankError(
                    f"internal error: {path} ended after {e0 + src.shape[0]} of {n_edges} edges"
                )
            ra = int(np.searchsorted(ends, e0, side="right"))  # first row ending after e0
            rb = int(np.searchsorted(ends, e1 - 1, side="right"))  # the row holding edge e1 - 1
            first = np.maximum(ends[ra : rb + 1] - in_deg[ra : rb + 1], e0)
            last = np.minimum(ends[ra : rb + 1], e1)
            dst = np.repeat(np.arange(ra, rb + 1, dtype=np.int64), last - first)
            w.add_edges(dst, src, None)
            rep.progress("writing shards", e1, n_edges, "edges", block=w._cur)


def build_integer(
    con: duckdb.DuckDBPyConnection,
    plan: IntPlan,
    tmp: Path,
    block_nodes: int,
    drop_loops: bool,
    threads: int | None,
    checked_width: Callable[[int], int],
    rep: Reporter,
) -> tuple[StoreWriter, np.ndarray, np.ndarray, dict[str, int]] | None:
    """Write nodes, degrees and shards of the store in ``tmp`` by the counting-sort path.

    Returns None (nothing written) if a key lies outside the planned range and the measured
    range is too wide for this path: the caller then takes the SQL path. Otherwise returns
    the writer (shards finished, manifest not yet written), the out- and in-degrees,
    and the counts the SQL path's dedupe step reports (``duplicates_merged``, ``self_loops``,
    ``self_loop_rows_dropped``, -1 meaning "all self-loop rows").
    """
    spill = tmp / "spill-ranges"
    spill.mkdir()
    old_threads = numba.get_num_threads()
    if threads:
        numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))  # type: ignore[attr-defined]
    try:
        present = np.zeros(plan.span, dtype=np.uint8)
        rep.event("phase", "partitioning edges by destination...", phase="partition")
        try:
            paths, sizes, _shift = _scatter(con, plan, spill, drop_loops, present, rep)
        except _OutOfRange:
            # footer statistics were not tight: measure the range and start again
            for p in spill.iterdir():
                p.unlink()
            lo, hi = _scan_range(con)
            wider = _plan_for(lo, hi, plan.n_rows, plan.memory)
            if wider is None:
                return None
            plan = wider
            present = np.zeros(plan.span, dtype=np.uint8)
            paths, sizes, _shift = _scatter(con, plan, spill, drop_loops, present, rep)
        ids = np.empty(plan.span, dtype=np.uint32)
        n = int(number_keys(present, ids))
        width = checked_width(n)
        rep.event("phase", "writing node keys...", phase="nodes")
        _write_nodes(tmp / layout.NODES, present, plan.lo, n)
        del present
        in_deg = np.zeros(n, dtype=np.int64)
        out_deg = np.zeros(n, dtype=np.int64)
        rep.event("phase", "sorting edges and merging duplicates...", phase="sort")
        sorted_path = spill / "sources.u32"
        n_edges, n_loops = _sort_ranges(
            paths, sizes, ids, plan.cap_edges, sorted_path, in_deg, out_deg, rep
        )
        del ids
        w = StoreWriter(tmp, n, block_nodes, f"<u{width // 8}", False)
        w.add_file(layout.NODES)
        w.write_array(layout.OUT_DEGREE, out_deg)
        w.write_array(layout.IN_DEGREE, in_deg)
        w.write_array(layout.OUT_WEIGHT, out_deg.astype(np.float64))
        w.begin_shards(in_deg, out_deg)
        _stream_sorted(sorted_path, w, in_deg, n_edges, rep)
        w.finish_shards()
        if w.n_edges != n_edges:
            raise ShardrankError(f"internal error: wrote {w.n_edges} edges, expected {n_edges}")
    finally:
        numba.set_num_threads(old_threads)
        shutil.rmtree(spill, ignore_errors=True)
    kept_rows = sum(sizes)
    counts = {
        "duplicates_merged": kept_rows - n_edges,
        "self_loops": n_loops,
        "self_loop_rows_dropped": -1 if drop_loops else 0,
    }
    return w, out_deg, in_deg, counts


__all__ = ["IntPlan", "build_integer", "plan_integer_build"]
