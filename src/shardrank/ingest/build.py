"""Build a store from edge tables: validate, map keys to ids, dedupe, count, partition, publish.

DuckDB does the heavy lifting with a memory limit and a spill directory on the store's disk;
Python only ever holds N-sized arrays and one Arrow batch of edges at a time.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import duckdb
import numpy as np
import psutil

from .. import settings
from ..errors import BadInputError, ShardrankError
from ..progress import Reporter
from ..store import layout, urls
from ..store.manifest import StoreManifest
from ..store.writer import StoreWriter
from .partition import build_integer, plan_integer_build
from .sources import InputFile, fingerprint_inputs, resolve_inputs
from .tables import (
    Columns,
    arrow_reader,
    check_same_key_types,
    choose_columns,
    describe,
    scan_sql,
    sniff_text,
    sql_ident,
    sql_str,
)


@dataclass
class BuildOptions:
    """Options of :func:`build_store`; every default comes from :mod:`shardrank.settings`."""

    src: str | None = None
    dst: str | None = None
    weight: str | None = None
    nodes: Sequence[str] = field(default_factory=list)
    self_loops: str = "keep"  # "keep" | "drop"
    header: str = "auto"  # text inputs: "auto" | "yes" | "no" (does the first line name the columns?)
    drop_nulls: bool = False
    memory: str | int | None = None  # bytes, "8GB", "40%"; default settings.MEMORY_FRACTION of RAM
    threads: int | None = None
    block_nodes: int = settings.BLOCK_NODES
    id_width: str | int = "auto"  # "auto" | 16 | 32 | 64 (bits of a stored source id)
    overwrite: bool = False


def parse_memory(value: str | int | None) -> int:
    """Bytes from ``None`` (default share of RAM), an int, "8GB", "512MiB" or "40%"."""
    total = psutil.virtual_memory().total
    if value is None:
        return int(total * settings.MEMORY_FRACTION)
    if isinstance(value, int):
        return value
    s = str(value).strip().upper().replace(" ", "")
    try:
        if s.endswith("%"):
            pct = float(s[:-1])
            if not 0 < pct <= 100:
                raise ValueError
            return int(total * pct / 100)
        units = {"KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40, "KB": 10**3, "MB": 10**6,
                 "GB": 10**9, "TB": 10**12, "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40, "B": 1}
        for u, mult in units.items():
            if s.endswith(u):
                return int(float(s[: -len(u)]) * mult)
        return int(s)
    except ValueError:
        raise BadInputError(
            f"--memory {value!r} is not a size", hint="write e.g. 8GB, 512MiB or 40% (of RAM)"
        ) from None


def _check_options(o: BuildOptions) -> None:
    if o.self_loops not in ("keep", "drop"):
        raise BadInputError(f"--self-loops must be keep or drop, not {o.self_loops!r}")
    if o.block_nodes < 1:
        raise BadInputError("--block-nodes must be at least 1")
    if o.header not in ("auto", "yes", "no"):
        raise BadInputError(f"--header must be auto, yes or no, not {o.header!r}")
    if o.id_width not in ("auto", 16, 32, 64):
        raise BadInputError(f"--id-width must be auto, 16, 32 or 64, not {o.id_width!r}")
    if o.threads is not None and o.threads < 1:
        raise BadInputError("--threads must be at least 1")


@contextmanager
def _watch(con: duckdb.DuckDBPyConnection, reporter: Reporter, phase: str) -> Iterator[None]:
    """Report DuckDB's own progress for a long statement, from a side thread."""
    stop = threading.Event()
    reporter.event("phase", f"{phase}...", phase=phase)

    def poll() -> None:
        while not stop.wait(0.5):
            try:
                pct = con.query_progress()
            except Exception:  # the statement may finish between checks
                return
            if pct is not None and pct >= 0:
                reporter.progress(phase, pct, 100.0, "%")

    t = threading.Thread(target=poll, daemon=True)
    t.start()
    try:
        yield
    finally:
        stop.set()
        t.join()


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by someone else
        pass
    return True


def _left_by_dead_builds(paths: list[Path]) -> list[Path]:
    """Siblings named ``...-PID`` whose process is gone (never this process's own)."""
    dead = []
    for p in paths:
        try:
            pid = int(p.name.rsplit("-", 1)[1])
        except ValueError:
            continue
        if pid != os.getpid() and not _pid_alive(pid):
            dead.append(p)
    return dead


def _remove_stale_partials(out: Path, reporter: Reporter) -> None:
    for p in _left_by_dead_builds(layout.stale_partials(out)):
        reporter.event("cleanup", f"removing {p.name} left by an interrupted build")
        shutil.rmtree(p, ignore_errors=True)
    # an --overwrite killed between its two renames leaves the old store aside; drop it only
    # once a store is in place again (until then it is the only copy, and is left for the user)
    if (out / layout.MANIFEST).is_file():
        for p in _left_by_dead_builds(layout.replaced_siblings(out)):
            reporter.event("cleanup", f"removing {p.name}, a store replaced by an interrupted --overwrite")
            shutil.rmtree(p, ignore_errors=True)


def build_store(
    edges: Sequence[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    options: BuildOptions | None = None,
    reporter: Reporter | None = None,
) -> StoreManifest:
    """Build a store at ``out`` from edge tables; return its manifest.

    Raises :class:`BadInputError` for bad input (nothing is left behind).
    """
    o = options or BuildOptions()
    rep = reporter or Reporter()
    _check_options(o)
    loc = urls.parse_location(out)
    if loc.local is None:
        return _build_to_url(edges, loc, o, rep)
    out_p = loc.local
    if out_p.exists() and not o.overwrite:
        raise BadInputError(f"{out_p} already exists", hint="pass --overwrite to replace it, or pick another --out")
    files = resolve_inputs([str(e) for e in edges])
    node_files = resolve_inputs([str(n) for n in o.nodes]) if o.nodes else []
    memory = parse_memory(o.memory)
    with staged_store(out_p, o.overwrite, rep) as tmp:
        manifest = _build(files, node_files, tmp, o, memory, rep)
    rep.done()
    return manifest


@contextmanager
def staged_store(out: Path, overwrite: bool, rep: Reporter) -> Iterator[Path]:
    """A fresh temporary sibling of ``out`` to write a store into (leftovers of dead builds
    are cleaned first); renamed to ``out`` on a clean exit, removed on any failure."""
    out.parent.mkdir(parents=True, exist_ok=True)
    _remove_stale_partials(out, rep)
    tmp = layout.partial_dir(out, os.getpid())
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    try:
        yield tmp
        rep.event("phase", "publishing the store...", phase="publish")
        _publish(tmp, out, overwrite)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _build_to_url(edges: Sequence[str | os.PathLike[str]], loc: urls.Location, o: BuildOptions,
                  rep: Reporter) -> StoreManifest:
    """Build in a local temporary directory ($TMPDIR), then upload it (manifest last)."""
    urls.check_writable(loc, o.overwrite)
    with tempfile.TemporaryDirectory(prefix="shardrank-build-") as d:
        manifest = build_store(edges, Path(d) / "store", replace(o, overwrite=False), rep)
        rep.event("phase", f"uploading the store to {loc}...", phase="upload")
        urls.upload_store(Path(d) / "store", loc, o.overwrite)
    return manifest


def _publish(tmp: Path, out: Path, overwrite: bool) -> None:
    from ..store.atomic import publish_dir

    try:
        publish_dir(tmp, out, overwrite)
    except FileExistsError:
        raise BadInputError(f"{out} already exists", hint="pass --overwrite to replace it") from None


_DUCKDB_THREAD_BYTES = 128 * 2**20  # DuckDB memory per default thread (see _connect)


def _connect(tmp: Path, memory: int, threads: int | None) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect(str(tmp / "work.duckdb"))
    # DuckDB gets the budget minus what Python keeps (N-sized arrays, one batch, the interpreter)
    con.execute(f"SET memory_limit = '{max(64 * 2**20, int(memory * 0.8)) // 2**20}MiB'")
    con.execute(f"SET temp_directory = {sql_str(str(tmp / 'spill'))}")
    con.execute("SET preserve_insertion_order = false")
    if not threads:
        # joins and aggregates need working memory per thread: with a small budget fewer
        # threads finish where more run out (measured: 5M string-key edges dedupe in 152 MiB
        # on 1 thread but not on 2, which need about 250 MiB)
        threads = max(1, min(os.cpu_count() or 1, max(64 * 2**20, int(memory * 0.8)) // _DUCKDB_THREAD_BYTES))
    con.execute(f"SET threads = {int(threads)}")
    return con


def _build(
    files: list[InputFile], node_files: list[InputFile], tmp: Path, o: BuildOptions, memory: int,
    rep: Reporter,
) -> StoreManifest:
    t0 = time.monotonic()
    con = _connect(tmp, memory, o.threads)
    try:
        where = str(files[0].path) if len(files) == 1 else f"edge files ({files[0].path}, ...)"
        files = sniff_text(con, files, o.header, [c for c in (o.src, o.dst, o.weight) if c] or ["src", "dst"])
        cols = choose_columns(describe(con, files), where, o.src, o.dst, o.weight)
        check_same_key_types(con, files, cols)
        counts = _validate_and_stage(con, files, cols, o, rep, where)
        # integer keys in a compact range: numba counting sort (see partition.py); else SQL
        plan = plan_integer_build(con, files, cols, counts["rows_read"] - counts["rows_dropped_null"],
                                  memory, cols.weight is not None, bool(node_files))
        fast = plan and build_integer(con, plan, tmp, o.block_nodes, o.self_loops == "drop", o.threads,
                                      lambda n: _checked_width(n, o), rep)
        if fast:
            w, out_deg, in_deg, dd = fast
            counts.update(dd)
            manifest = _finish(w, cols, o, counts, files, node_files, out_deg, in_deg, rep, "counting-sort")
        else:
            n = _map_keys(con, cols, node_files, o, rep)
            _check_width(n, o)
            counts.update(_dedupe(con, cols, o, rep))
            manifest = _write(con, tmp, n, cols, o, counts, files, node_files, rep)
    except duckdb.OutOfMemoryException as e:
        raise BadInputError(
            f"the build ran out of memory within --memory {memory / 2**20:,.1f} MiB "
            f"({str(e).splitlines()[0]})",
            hint="pass a larger --memory (DuckDB gets 80% of it) or fewer --threads",
        ) from None
    finally:
        con.close()
    for name in ("work.duckdb", "work.duckdb.wal"):
        (tmp / name).unlink(missing_ok=True)
    shutil.rmtree(tmp / "spill", ignore_errors=True)
    rep.event(
        "built", f"built store: {manifest.n_nodes:,} nodes, {manifest.n_edges:,} edges, "
        f"{len(manifest.blocks)} blocks in {time.monotonic() - t0:.1f} s",
        nodes=manifest.n_nodes, edges=manifest.n_edges,
    )
    return manifest


def _validate_and_stage(
    con: duckdb.DuckDBPyConnection, files: list[InputFile], cols: Columns, o: BuildOptions,
    rep: Reporter, where: str,
) -> dict[str, int]:
    """Count rows, nulls and bad weights in one scan; stage clean rows as a view."""
    key_sql = "BIGINT" if cols.key_type == "int64" else "VARCHAR"
    w_sql = f", CAST({sql_ident(cols.weight)} AS DOUBLE) AS w" if cols.weight else ""
    con.execute(
        f"CREATE TEMP VIEW raw AS SELECT CAST({sql_ident(cols.src)} AS {key_sql}) AS s, "
        f"CAST({sql_ident(cols.dst)} AS {key_sql}) AS d{w_sql} FROM {scan_sql(files)}"
    )
    wchecks = (
        ", count(*) FILTER (WHERE w IS NULL), count(*) FILTER (WHERE isnan(w)), "
        "count(*) FILTER (WHERE isinf(w)), count(*) FILTER (WHERE w <= 0)"
        if cols.weight else ""
    )
    try:
        with _watch(con, rep, "reading edges"):
            row = con.execute(
                f"SELECT count(*), count(*) FILTER (WHERE s IS NULL OR d IS NULL), "
                f"count(*) FILTER (WHERE s = d){wchecks} FROM raw"
            ).fetchall()[0]
    except duckdb.ConversionException as e:
        raise BadInputError(
            f"{where}: keys of mixed types or values that do not fit ({str(e).splitlines()[0]})",
            hint="make every key an integer or every key a string",
        ) from None
    except duckdb.Error as e:
        raise BadInputError(f"{where}: cannot be read ({str(e).splitlines()[0]})",
                            hint="check that every input file is complete and well-formed") from None
    assert row is not None
    n_rows, n_null, n_loops = int(row[0]), int(row[1]), int(row[2])
    if n_rows == 0:
        raise BadInputError(f"{where}: no edges (the input is empty)", hint="check the input path")
    if n_null and not o.drop_nulls:
        raise BadInputError(
            f"{where}: {n_null:,} of {n_rows:,} rows have a null '{cols.src}' or '{cols.dst}'",
            hint="pass --drop-nulls to skip those rows (they are counted in the manifest)",
        )
    if cols.weight:
        n_wnull, n_nan, n_inf, n_nonpos = (int(x) for x in row[3:7])
        bad = [(n_wnull, "null"), (n_nan, "NaN"), (n_inf, "infinite"), (n_nonpos, "zero or negative")]
        msgs = [f"{c:,} {what}" for c, what in bad if c]
        if msgs:
            raise BadInputError(
                f"{where}: weight column '{cols.weight}' has {', '.join(msgs)} values; "
                "weights must be positive finite numbers",
                hint="filter or fix those rows, or build without --weight",
            )
    if n_rows - n_null == 0:
        raise BadInputError(f"{where}: every row has a null key; no edges left",
                            hint="check the --src/--dst columns")
    con.execute("CREATE TEMP VIEW clean AS SELECT * FROM raw WHERE s IS NOT NULL AND d IS NOT NULL")
    return {"rows_read": n_rows, "rows_dropped_null": n_null, "self_loop_rows": n_loops}


def _map_keys(
    con: duckdb.DuckDBPyConnection, cols: Columns, node_files: list[InputFile], o: BuildOptions,
    rep: Reporter,
) -> int:
    """Dense ids 0..N-1 in key order (lexicographic strings, numeric integers)."""
    extra = ""
    if node_files:
        node_files = sniff_text(con, node_files, o.header, ["key"], min_columns=1)
        schema = describe(con, node_files)
        name = "key" if "key" in dict(schema) else schema[0][0]
        from .tables import key_class

        if key_class(dict(schema)[name]) != cols.key_type:
            raise BadInputError(
                f"{node_files[0].path}: node keys are {dict(schema)[name]} but edge keys are "
                f"{cols.key_type}", hint="use the same key type for --nodes as for the edges")
        key_sql = "BIGINT" if cols.key_type == "int64" else "VARCHAR"
        extra = (f" UNION SELECT CAST({sql_ident(name)} AS {key_sql}) FROM {scan_sql(node_files)} "
                 f"WHERE {sql_ident(name)} IS NOT NULL")
    with _watch(con, rep, "mapping keys to ids"):
        con.execute(
            "CREATE TABLE keys AS SELECT key, (row_number() OVER (ORDER BY key) - 1)::BIGINT AS id "
            f"FROM (SELECT s AS key FROM clean UNION SELECT d FROM clean{extra})"
        )
    row = con.execute("SELECT count(*) FROM keys").fetchall()[0]
    assert row is not None
    return int(row[0])


def _width_for(n: int, o: BuildOptions) -> int:
    return (32 if n <= 2**32 else 64) if o.id_width == "auto" else int(o.id_width)


def _check_width(n: int, o: BuildOptions) -> None:
    w = _width_for(n, o)
    if n > 2**w:
        raise BadInputError(
            f"{n:,} nodes do not fit in {w}-bit ids (at most {2**w:,})",
            hint="pass --id-width 64 (or auto)",
        )


def _checked_width(n: int, o: BuildOptions) -> int:
    """The bits of a stored source id for ``n`` nodes; BadInputError if they do not fit."""
    _check_width(n, o)
    return _width_for(n, o)


def _dedupe(con: duckdb.DuckDBPyConnection, cols: Columns, o: BuildOptions, rep: Reporter) -> dict[str, int]:
    loop_filter = "WHERE c.s <> c.d" if o.self_loops == "drop" else ""
    wsum = ", sum(c.w) AS w" if cols.weight else ""
    with _watch(con, rep, "mapping edges and merging duplicates"):
        con.execute(
            f"CREATE TABLE edges AS SELECT a.id AS s, b.id AS d{wsum}, count(*) AS n FROM clean c "
            f"JOIN keys a ON c.s = a.key JOIN keys b ON c.d = b.key {loop_filter} GROUP BY a.id, b.id"
        )
    row = con.execute(
        "SELECT count(*), coalesce(sum(n), 0), count(*) FILTER (WHERE s = d) FROM edges"
    ).fetchall()[0]
    assert row is not None
    n_edges, n_kept_rows, n_loops = int(row[0]), int(row[1]), int(row[2])
    return {"duplicates_merged": n_kept_rows - n_edges, "self_loops": n_loops,
            "self_loop_rows_dropped": 0 if o.self_loops == "keep" else -1, "edges": n_edges}


def _degrees(con: duckdb.DuckDBPyConnection, col: str, n: int, weighted: bool) -> tuple[np.ndarray, np.ndarray | None]:
    deg = np.zeros(n, dtype=np.int64)
    wsum = np.zeros(n, dtype=np.float64) if weighted else None
    wsel = ", sum(w)" if weighted else ""
    rdr = arrow_reader(con, f"SELECT {col}, count(*){wsel} FROM edges GROUP BY {col}", settings.BATCH_ROWS)
    for batch in rdr:
        ids = batch.column(0).to_numpy()
        deg[ids] = batch.column(1).to_numpy()
        if wsum is not None:
            wsum[ids] = batch.column(2).to_numpy()
    return deg, wsum


def _write(
    con: duckdb.DuckDBPyConnection, tmp: Path, n: int, cols: Columns, o: BuildOptions,
    counts: dict[str, int], files: list[InputFile], node_files: list[InputFile], rep: Reporter,
) -> StoreManifest:
    weighted = cols.weight is not None
    width = _width_for(n, o)
    w = StoreWriter(tmp, n, o.block_nodes, f"<u{width // 8}", weighted)
    rep.event("phase", "writing node keys and degrees...", phase="degrees")
    con.execute(f"COPY (SELECT id, key FROM keys ORDER BY id) TO {sql_str(str(tmp / layout.NODES))} "
                "(FORMAT parquet, COMPRESSION zstd)")
    w.add_file(layout.NODES)
    out_deg, out_w = _degrees(con, "s", n, weighted)
    if out_w is not None and not np.all(np.isfinite(out_w)):
        # every weight is positive, so finite out-weights mean finite merged edge weights too
        raise BadInputError(
            f"{files[0].path}: weights too large: the out-weight (sum of out-link weights) of "
            f"{int(np.count_nonzero(~np.isfinite(out_w))):,} nodes overflows a float64",
            hint="scale the weights down (only their ratios matter)",
        )
    in_deg, _ = _degrees(con, "d", n, False)
    w.write_array(layout.OUT_DEGREE, out_deg)
    w.write_array(layout.IN_DEGREE, in_deg)
    # always written: the rank kernel memory-maps it (the out-degree as float64 when unweighted)
    w.write_array(layout.OUT_WEIGHT, out_w if out_w is not None else out_deg.astype(np.float64))
    w.begin_shards(in_deg, out_deg)
    n_edges = counts.pop("edges")
    wsel = ", w" if weighted else ""
    with _watch(con, rep, "sorting edges by destination"):
        rdr = arrow_reader(con, f"SELECT d, s{wsel} FROM edges ORDER BY d, s", settings.BATCH_ROWS)
    written = 0
    for batch in rdr:
        d = batch.column(0).to_numpy()
        s = batch.column(1).to_numpy()
        wt = batch.column(2).to_numpy() if weighted else None
        w.add_edges(d, s, wt)
        written += batch.num_rows
        rep.progress("writing shards", written, n_edges, "edges", block=w._cur)
    w.finish_shards()
    if w.n_edges != n_edges:
        raise ShardrankError(f"internal error: wrote {w.n_edges} edges, expected {n_edges}")
    return _finish(w, cols, o, counts, files, node_files, out_deg, in_deg, rep, "sql")


def _finish(
    w: StoreWriter, cols: Columns, o: BuildOptions, counts: dict[str, int], files: list[InputFile],
    node_files: list[InputFile], out_deg: np.ndarray, in_deg: np.ndarray, rep: Reporter, build_path: str,
) -> StoreManifest:
    """Counts, options and input fingerprint into the manifest, written last."""
    dead = int(np.count_nonzero(out_deg == 0))
    counts.update({"dead_ends": dead, "no_in_links": int(np.count_nonzero(in_deg == 0))})
    if counts["self_loop_rows_dropped"] == -1:
        counts["self_loop_rows_dropped"] = counts["self_loop_rows"]
    opts = {k: v for k, v in asdict(o).items() if k not in ("overwrite", "memory", "threads")}
    opts["nodes"] = [str(x) for x in o.nodes]
    opts["src"], opts["dst"], opts["weight"] = cols.src, cols.dst, cols.weight
    opts["build_path"] = build_path  # "counting-sort" (partition.py) or "sql"; same store either way
    fp_opts = {k: opts[k] for k in ("src", "dst", "weight", "self_loops", "drop_nulls", "block_nodes")}
    rep.event("phase", "fingerprinting inputs...", phase="fingerprint")
    input_info = fingerprint_inputs(files + node_files, fp_opts)
    return w.write_manifest(cols.key_type, input_info, opts, counts)
