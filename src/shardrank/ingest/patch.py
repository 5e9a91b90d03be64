"""Patch a store with a delta of edges: a new store equal to a full build of the new edge set.

The edge set of an unweighted store is a set of (source, destination) key pairs. A delta is two
lists of edge tables, ADD and REMOVE (Parquet or CSV, read like build inputs). The patched edge
set is ``(old - REMOVE) | ADD``: a removed edge that is also added stays, removing an edge the
store does not hold is counted, not an error, and the store's self-loop rule applies to ADD.
Nodes are the keys of the patched edges: a key left without any edge vanishes, keys of added
edges appear, and ids stay in key order. The result is what ``shardrank build`` of the new
edge set writes, byte for byte in every ``.npy`` file (docs/delta.md).

How, in bounded memory (the delta, O(N) vectors and one chunk of edges, never the edge list):

1. read the delta with DuckDB; map its keys to old ids (a binary search of the old keys);
2. look the delta's pairs up in the old shards (a binary search within each row), which
   settles the edges really removed and really added, hence the new degrees and the nodes
   that vanish or appear; the old-id -> new-id map is monotone;
3. walk the new ids in chunks of about ``CHUNK_EDGES`` edges: the old rows of the chunk
   (old slots -> old ids -> new ids), minus the removed pairs, merged with the chunk's added
   pairs, into the :class:`StoreWriter` (which computes the read slots exactly as a build);
4. publish atomically like a build (temporary sibling, manifest last, rename).
"""

from __future__ import annotations

import hashlib
import os
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .. import settings
from ..errors import BadInputError, ShardrankError
from ..kernels.patch import (
    find_in_rows,
    merge_rows,
    new_degrees,
    renumber,
    scatter_kept,
    slot_to_new_id,
)
from ..progress import Reporter
from ..store import layout, urls
from ..store.manifest import StoreManifest
from ..store.reader import StoreReader
from ..store.writer import StoreWriter
from .build import BuildOptions, _checked_width, staged_store
from .delta import (
    as_keys,
    count_below,
    distinct_pairs,
    equal_at,
    pack_pairs,
    read_delta,
    split_pairs,
    unique_keys,
)
from .sources import InputFile, fingerprint_inputs, resolve_inputs

CHUNK_EDGES = 1 << 21  # edges of the new store handled at once (about 100 MiB of temporaries)


# -- refusing what a patch cannot reproduce --------------------------------------------------------
def _check_store(r: StoreReader) -> None:
    m, where = r.manifest, r.path
    hint = "build the new store in full with `shardrank build`"
    if m.version < 2:
        raise BadInputError(
            f"{where}: store format version {m.version} cannot be patched (read slots "
            "arrived in version 2)",
            hint=f"rebuild it once with this shardrank; {hint}",
        )
    if m.weighted:
        raise BadInputError(
            f"{where}: a weighted store cannot be patched (only unweighted edge sets)", hint=hint
        )
    if m.options.get("nodes"):
        raise BadInputError(
            f"{where}: was built with --nodes (extra isolated nodes a patch cannot track)",
            hint=hint,
        )
    if m.n_nodes >= 2**32:
        raise BadInputError(
            f"{where}: {m.n_nodes:,} nodes; a patch handles fewer than 2^32", hint=hint
        )


# -- looking pairs up in the old shards ------------------------------------------------------------
def _present(
    r: StoreReader, slot: np.ndarray, dst: np.ndarray, src: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Whether each old-id pair (src -> dst) is an edge of the old store, and where: its index
    in the store's edges, blocks one after the other (a binary search of the source's read
    slot within the destination's row; rows are ascending by slot)."""
    found = np.zeros(dst.shape[0], dtype=bool)
    where = np.zeros(dst.shape[0], dtype=np.int64)
    if dst.shape[0] == 0:
        return found, where
    base = np.concatenate([[0], np.cumsum([b.n_edges for b in r.manifest.blocks])])
    bn = r.manifest.block_nodes
    blk = dst // bn
    order = np.argsort(blk, kind="stable")
    bounds = np.searchsorted(blk[order], np.arange(r.n_blocks + 1))
    for b in np.flatnonzero(np.diff(bounds)).tolist():
        idx = order[bounds[b] : bounds[b + 1]]
        sh = r.shard(b)
        local = dst[idx] - sh.info.first_node
        hit = np.empty(idx.shape[0], dtype=bool)
        at = np.empty(idx.shape[0], dtype=np.int64)
        target = slot[src[idx]].astype(np.int64)
        off, srcs = np.asarray(sh.offsets), np.asarray(sh.sources)
        find_in_rows(off, srcs, local, target, base[b], hit, at)
        found[idx] = hit
        where[idx] = at
    return found, where


# -- the patch -------------------------------------------------------------------------------------
def patch_store(
    old: str | os.PathLike[str],
    out: str | os.PathLike[str],
    add: Sequence[str | os.PathLike[str]] = (),
    remove: Sequence[str | os.PathLike[str]] = (),
    overwrite: bool = False,
    reporter: Reporter | None = None,
    src: str | None = None,
    dst: str | None = None,
    threads: int | None = None,
) -> StoreManifest:
    """Write at ``out`` the store of ``old``'s edges minus ``remove`` plus ``add``; return its
    manifest.

    Parameters
    ----------
    old : an unweighted store (format version 2 or later, built without ``--nodes``)
    out : the store directory to create (a local path)
    add, remove : edge tables (files, directories, globs; Parquet or CSV) with the store's key
        type, columns named like the store's ``src``/``dst`` options unless ``src``/``dst``
        are given; either may be empty
    overwrite : replace an existing ``out``
    reporter : progress and events
    threads : DuckDB threads for reading the delta

    Notes
    -----
    The new edge set is ``(old - remove) | add`` over distinct (src, dst) key pairs, under the
    store's self-loop rule (``self_loops: drop`` drops added self-loops). A removed pair the
    store lacks is counted (``removals_absent``), not an error; a pair both removed and added
    stays. Nodes are the keys of the new edges: a key left with no edge vanishes, keys of
    added edges appear, and ids follow key order, as a build assigns them. Every ``.npy`` file
    equals, byte for byte, what ``shardrank build`` of the new edge set (with the old store's
    options) writes, and the node keys are the same. Memory: the delta, a few N-sized
    vectors and one chunk of ``CHUNK_EDGES`` edges.

    Raises
    ------
    BadInputError
        a weighted, ``--nodes`` or version-1 store; delta keys of the other type; null keys;
        ``out`` exists without ``overwrite``; no edge left. Nothing is left at ``out``.
    DamagedDataError
        the old store fails its checksums.
    """
    rep = reporter or Reporter()
    loc = urls.parse_location(out)
    if loc.local is None:
        raise BadInputError(
            f"{out}: a patch writes a local store",
            hint="patch into a local directory, then copy it",
        )
    out_p = loc.local
    if out_p.exists() and not overwrite:
        raise BadInputError(
            f"{out_p} already exists", hint="pass --overwrite to replace it, or pick another --out"
        )
    r = StoreReader.open(Path(old))
    _check_store(r)
    m = r.manifest
    opts = dict(m.options)
    src, dst = src or opts.get("src") or "src", dst or opts.get("dst") or "dst"
    header = str(opts.get("header", "auto"))
    t0 = time.monotonic()
    rep.event("phase", "reading the delta...", phase="delta")
    add_files, t_add = read_delta(add, m, src, dst, header, threads)
    rem_files, t_rem = read_delta(remove, m, src, dst, header, threads)
    rep.event("phase", "verifying the old store's checksums...", phase="verify")
    r.verify_checksums(
        lambda name, i, n: rep.progress("verifying the old store", i + 1, n, "files")
    )
    with staged_store(out_p, overwrite, rep) as tmp:
        manifest = _patch(r, tmp, t_add, t_rem, add_files, rem_files, rep)
    rep.event(
        "built",
        f"patched store: {manifest.n_nodes:,} nodes, {manifest.n_edges:,} edges "
        f"(+{manifest.counts['edges_added']:,} -{manifest.counts['edges_removed']:,}) in "
        f"{time.monotonic() - t0:.1f} s",
        nodes=manifest.n_nodes,
        edges=manifest.n_edges,
    )
    rep.done()
    return manifest


def _patch(
    r: StoreReader,
    tmp: Path,
    t_add: pa.Table,
    t_rem: pa.Table,
    add_files: list[InputFile],
    rem_files: list[InputFile],
    rep: Reporter,
) -> StoreManifest:
    m = r.manifest
    n_old, kt = m.n_nodes, m.key_type
    drop_loops = m.options.get("self_loops") == "drop"
    rep.event("phase", "looking the delta up in the old store...", phase="lookup")
    # 1. delta keys -> old ids (-1: not in the store)
    uniq, (a_s, a_d, r_s, r_d) = unique_keys(t_add, t_rem, kt)
    rep.event("phase", "reading the old keys...", phase="keys")
    old_keys = as_keys(r.keys(), kt)
    below = count_below(old_keys, uniq, kt)
    in_store = equal_at(old_keys, below, uniq, kt)
    old_of_u = np.where(in_store, below, -1)
    # 2. distinct pairs (indices into uniq), the self-loop rule, and their fate in the old store
    add_loop_rows = int(np.count_nonzero(a_s == a_d))
    keep = a_s != a_d if drop_loops else slice(None)
    A = distinct_pairs(a_d[keep], a_s[keep])
    R = distinct_pairs(r_d, r_s)
    slot = np.asarray(r.read_slot())

    def present(p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        d, s = split_pairs(p)
        od, os_ = old_of_u[d], old_of_u[s]
        both = (od >= 0) & (os_ >= 0)
        hit = np.zeros(p.shape[0], dtype=bool)
        at = np.zeros(p.shape[0], dtype=np.int64)
        hit[both], at[both] = _present(r, slot, od[both], os_[both])
        return hit, at

    rep.event("phase", "searching the old shards for the delta's edges...", phase="search")
    (a_present, _), (r_present, r_at) = present(A), present(R)
    gone = r_present & ~np.isin(R, A, assume_unique=True)
    r_eff = R[gone]  # edges really removed
    rem_at = np.sort(r_at[gone])  # and where they sit in the old shards
    a_eff = A[~a_present]  # edges really added
    # 3. new degrees, vanished and new nodes, the monotone old id -> new id map
    rep.event("phase", "numbering the nodes...", phase="number")
    in_old, out_old = np.asarray(r.in_degree()), np.asarray(r.out_degree())
    rd, rs = split_pairs(r_eff)
    rd, rs = old_of_u[rd], old_of_u[rs]
    ad_u, as_u = split_pairs(a_eff)
    touched = np.concatenate([old_of_u[ad_u], old_of_u[as_u]])  # old nodes given an added edge
    touched = touched[touched >= 0]
    u_new = np.zeros(len(uniq), dtype=bool)
    u_new[ad_u] = True
    u_new[as_u] = True
    u_new &= old_of_u < 0
    new_u = np.flatnonzero(u_new)  # indices into uniq of the keys that appear, in key order
    ins = below[new_u]  # old keys smaller than each new key
    old_to_new = np.empty(n_old, dtype=np.int64)
    pos_new = np.empty(n_old, dtype=np.int64)  # monotone: the new id of each kept old id
    at_ins = np.empty(new_u.shape[0], dtype=np.int64)  # kept old ids below each new key
    n_kept = renumber(in_old, out_old, rd, rs, touched, ins, old_to_new, pos_new, at_ins)
    u_to_new = np.full(len(uniq), -1, dtype=np.int64)
    u_to_new[in_store] = old_to_new[old_of_u[in_store]]
    u_to_new[new_u] = np.arange(new_u.shape[0]) + at_ins
    n_new = n_kept + new_u.shape[0]
    if n_new == 0:
        raise BadInputError(
            "the patch removes every edge; a store needs at least one",
            hint="check the --remove tables",
        )
    if n_new >= 2**32:
        raise BadInputError(
            f"{n_new:,} nodes after the patch; a patch handles fewer than 2^32",
            hint="build the new store in full with `shardrank build`",
        )
    add_new = np.sort(pack_pairs(u_to_new[ad_u], u_to_new[as_u]))  # added edges in new ids
    nd, ns = split_pairs(add_new)
    new_in = np.zeros(n_new, dtype=np.int64)
    new_out = np.zeros(n_new, dtype=np.int64)
    new_degrees(in_old, out_old, old_to_new, rd, rs, nd, ns, new_in, new_out)
    kept = old_to_new >= 0
    # 4. write: nodes, degrees, read slots and offsets, then the shards chunk by chunk
    width = _checked_width(n_new, BuildOptions(id_width=m.options.get("id_width", "auto")))
    w = StoreWriter(tmp, n_new, m.block_nodes, f"<u{width // 8}", False)
    rep.event("phase", "writing node keys and degrees...", phase="degrees")
    _write_nodes(tmp / layout.NODES, old_keys, kept, old_to_new, uniq, new_u, u_to_new, n_new, kt)
    w.add_file(layout.NODES)
    w.write_array(layout.OUT_DEGREE, new_out)
    w.write_array(layout.IN_DEGREE, new_in)
    w.write_array(layout.OUT_WEIGHT, new_out.astype(np.float64))
    w.begin_shards(new_in, new_out)
    _write_shards(r, w, new_in, pos_new, old_to_new, rem_at, add_new, rep)
    n_edges = m.n_edges - r_eff.shape[0] + a_eff.shape[0]
    if w.n_edges != n_edges:
        raise ShardrankError(f"internal error: wrote {w.n_edges} edges, expected {n_edges}")
    loops = (
        int(m.counts.get("self_loops", 0))
        - int(np.count_nonzero(rd == rs))
        + int(np.count_nonzero(nd == ns))
    )
    counts = {
        "rows_read": t_add.num_rows + t_rem.num_rows,
        "rows_dropped_null": 0,
        "self_loop_rows": add_loop_rows,
        "duplicates_merged": t_add.num_rows - (add_loop_rows if drop_loops else 0) - A.shape[0],
        "self_loops": loops,
        "self_loop_rows_dropped": add_loop_rows if drop_loops else 0,
        "dead_ends": int(np.count_nonzero(new_out == 0)),
        "no_in_links": int(np.count_nonzero(new_in == 0)),
        "add_rows": t_add.num_rows,
        "remove_rows": t_rem.num_rows,
        "edges_added": int(a_eff.shape[0]),
        "edges_removed": int(r_eff.shape[0]),
        "additions_present": int(np.count_nonzero(a_present)),
        "removals_absent": int(np.count_nonzero(~r_present)),
        "nodes_added": int(new_u.shape[0]),
        "nodes_vanished": n_old - n_kept,
    }
    return _manifest(w, r, add_files, rem_files, counts)


def _write_nodes(
    path: Path,
    old_keys: Any,
    kept: np.ndarray,
    old_to_new: np.ndarray,
    uniq: Any,
    new_u: np.ndarray,
    u_to_new: np.ndarray,
    n_new: int,
    kt: str,
) -> None:
    """nodes.parquet: id, key in new id order (surviving old keys merged with the new ones)."""
    if kt == "int64":
        # the keys themselves in new id order: surviving old keys scattered, new keys added
        keys: Any = np.empty(n_new, dtype=np.int64)
        scatter_kept(old_to_new, old_keys, keys)
        keys[u_to_new[new_u]] = uniq[new_u]
        ktype = pa.int64()
    else:
        by_new = np.empty(n_new, dtype=np.int64)  # into old keys, or n_old + index into uniq
        by_new[old_to_new[kept]] = np.flatnonzero(kept)
        by_new[u_to_new[new_u]] = len(old_keys) + new_u
        keys = pa.concat_arrays([old_keys, uniq.cast(pa.large_string())])
        ktype = pa.string()
    schema = pa.schema([("id", pa.int64()), ("key", ktype)])
    step = settings.BATCH_ROWS
    with pq.ParquetWriter(path, schema, compression="zstd") as wr:
        for a in range(0, n_new, step):
            b = min(a + step, n_new)
            k = (
                pa.array(keys[a:b])
                if kt == "int64"
                else pc.take(keys, pa.array(by_new[a:b])).cast(ktype)
            )
            wr.write_table(
                pa.table([pa.array(np.arange(a, b, dtype=np.int64)), k], schema=schema),
                row_group_size=step,
            )


def _write_shards(
    r: StoreReader,
    w: StoreWriter,
    new_in: np.ndarray,
    pos_new: np.ndarray,
    old_to_new: np.ndarray,
    rem_at: np.ndarray,
    add_new: np.ndarray,
    rep: Reporter,
) -> None:
    """Stream the new in-edges, chunk by chunk of new destination ids, into the writer.

    Rows go to the writer with their old edges in the old store's slot order (the writer's
    relabel sort is fast on rows that arrive nearly sorted), added edges after them."""
    # old slot -> new id, composed once, for one gather per edge. New ids fit in uint32 (a
    # patch refuses 2^32 nodes): half the bytes of int64 for that random gather and for the
    # writer's passes over the chunk; a vanished source (-1, wrapped) is never read, all its
    # edges being removed ones
    slot_to_new = np.empty(pos_new.shape[0], dtype=np.uint32)
    slot_to_new_id(np.asarray(r.read_slot()), old_to_new, slot_to_new)
    ends = np.cumsum(new_in)
    total = int(ends[-1]) if ends.shape[0] else 0
    n_new, n_old = new_in.shape[0], pos_new.shape[0]
    add_d, add_s = split_pairs(add_new)
    bn = r.manifest.block_nodes
    # the old blocks open as the chunks reach them and close once passed: mapped pages of
    # passed blocks leave the process's resident set
    opened: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def block(i: int) -> tuple[np.ndarray, np.ndarray]:
        if i not in opened:
            for j in [j for j in opened if j < i]:
                del opened[j]
            sh = r.shard(i)
            opened[i] = np.asarray(sh.offsets, dtype=np.int64), np.asarray(sh.sources)
        return opened[i]

    e_base = np.concatenate([[0], np.cumsum([b.n_edges for b in r.manifest.blocks])]).tolist()
    old_in = np.asarray(r.in_degree())
    # the chunk's output buffers, reused: every old edge of the chunk plus every added edge
    # at most (a kept old row's edges never grow beyond old + added)
    cap = 0
    out_d = np.empty(0, dtype=np.uint32)
    out_s = np.empty(0, dtype=np.uint32)
    a, rp, kp = 0, 0, 0
    while a < n_new:
        # the next chunk: new ids a .. b - 1 holding about CHUNK_EDGES edges (at least one row)
        b = max(
            a + 1, int(np.searchsorted(ends, (ends[a - 1] if a else 0) + CHUNK_EDGES, side="right"))
        )
        b = min(b, n_new)
        # their old rows: a contiguous old id range (the map is monotone; vanished rows inside
        # it lose every in-edge to the removals)
        oa, ob = int(np.searchsorted(pos_new, a)), int(np.searchsorted(pos_new, b))
        if b == n_new:
            ob = n_old
        ka = int(np.searchsorted(add_d, b))  # added edges of this chunk end here
        need = int(old_in[oa:ob].sum()) + (ka - kp)
        if need > cap:
            cap = max(need, 2 * cap)
            out_d = np.empty(cap, dtype=np.uint32)
            out_s = np.empty(cap, dtype=np.uint32)
        o = 0
        for blk in range(oa // bn, (ob - 1) // bn + 1 if ob > oa else 0):
            first = r.manifest.blocks[blk].first_node
            i0 = max(oa, first) - first
            i1 = min(ob, first + r.manifest.blocks[blk].n_nodes) - first
            off, srcs = block(blk)
            o, rp, kp = merge_rows(
                off[i0 : i1 + 1],
                srcs,
                e_base[blk],
                old_to_new[first + i0 : first + i1],
                slot_to_new,
                rem_at,
                rp,
                add_d[:ka],
                add_s[:ka],
                kp,
                out_d,
                out_s,
                o,
            )
        # added edges of new nodes after the chunk's last old row
        tail = ka - kp
        out_d[o : o + tail] = add_d[kp:ka]
        out_s[o : o + tail] = add_s[kp:ka]
        o, kp = o + tail, ka
        w.add_edges(out_d[:o], out_s[:o], None)
        rep.progress("writing shards", int(ends[b - 1]), total, "edges", block=w._cur)
        a = b
    w.finish_shards()


def _manifest(
    w: StoreWriter,
    r: StoreReader,
    add_files: list[InputFile],
    rem_files: list[InputFile],
    counts: dict[str, int],
) -> StoreManifest:
    """Options copied from the old store; the input fingerprint covers the old store and both
    sides of the delta, so a patched store never passes for a build of some snapshot."""
    m = r.manifest
    opts = dict(m.options)
    opts["build_path"] = "patch"
    fp_opts = {k: opts.get(k) for k in ("src", "dst", "self_loops", "block_nodes")}
    add_fp = fingerprint_inputs(add_files, fp_opts)
    rem_fp = fingerprint_inputs(rem_files, fp_opts)
    input_info = {
        "fingerprint": patched_fingerprint(m.fingerprint, add_fp, rem_fp),
        "patched_from": m.fingerprint,
        "patched_from_path": str(r.path),
        "add": add_fp,
        "remove": rem_fp,
    }
    return w.write_manifest(m.key_type, input_info, opts, counts)


# -- the fingerprint of a patched store, also computed by refresh before patching ----------------
def delta_input_fingerprints(
    m: StoreManifest,
    add: Sequence[str | os.PathLike[str]],
    remove: Sequence[str | os.PathLike[str]],
) -> tuple[dict[str, Any], dict[str, Any]]:
    """The input fingerprints of both sides of a delta to the store of manifest ``m``."""
    fp_opts = {k: m.options.get(k) for k in ("src", "dst", "self_loops", "block_nodes")}
    sides = [resolve_inputs([str(p) for p in paths]) if paths else [] for paths in (add, remove)]
    return fingerprint_inputs(sides[0], fp_opts), fingerprint_inputs(sides[1], fp_opts)


def patched_fingerprint(
    old_fingerprint: str, add_fp: dict[str, Any], rem_fp: dict[str, Any]
) -> str:
    """``input["fingerprint"]`` of a patched store: the old store and both sides of the delta."""
    return hashlib.sha256(
        f"patch {old_fingerprint} {add_fp['fingerprint']} {rem_fp['fingerprint']}".encode()
    ).hexdigest()
