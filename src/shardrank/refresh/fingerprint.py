"""Fingerprints that decide whether earlier work can be reused: the snapshot's, computed
before building (the same value `shardrank build` records in the store's manifest), and
the teleport table's (the same value `shardrank rank` records in run.json)."""

from __future__ import annotations

import hashlib
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import duckdb

from ..errors import BadInputError
from ..ingest.build import BuildOptions
from ..ingest.patch import delta_input_fingerprints, patched_fingerprint
from ..ingest.sources import fingerprint_inputs, resolve_inputs
from ..ingest.tables import Columns, choose_columns, describe, sniff_text
from ..solve.options import RankOptions
from ..solve.tables import load_teleport
from ..store.manifest import StoreManifest
from ..store.reader import StoreReader


@dataclass(frozen=True)
class Snapshot:
    """What refresh learns about tonight's inputs before building."""

    fingerprint: str  # equals the built store's manifest ``input["fingerprint"]``
    columns: Columns
    where: str  # how to name the inputs in a message


def input_fingerprint(edges: Sequence[str | os.PathLike[str]], o: BuildOptions) -> Snapshot:
    """The ``input["fingerprint"]`` that ``build_store(edges, ..., o)`` would record, and the columns.

    Mirrors ingest/build.py: the resolved column names plus the options that shape the store
    (a test checks that the two agree). Reads every input byte once (sha256).
    """
    files = resolve_inputs([str(e) for e in edges])
    node_files = resolve_inputs([str(n) for n in o.nodes]) if o.nodes else []
    con = duckdb.connect()
    try:
        where = str(files[0].path) if len(files) == 1 else f"edge files ({files[0].path}, ...)"
        files = sniff_text(
            con, files, o.header, [c for c in (o.src, o.dst, o.weight) if c] or ["src", "dst"]
        )
        cols = choose_columns(describe(con, files), where, o.src, o.dst, o.weight)
    finally:
        con.close()
    fp_opts: dict[str, object] = {
        "src": cols.src,
        "dst": cols.dst,
        "weight": cols.weight,
        "self_loops": o.self_loops,
        "drop_nulls": o.drop_nulls,
        "block_nodes": o.block_nodes,
    }
    return Snapshot(
        str(fingerprint_inputs(files + node_files, fp_opts)["fingerprint"]), cols, where
    )


def check_same_schema(snap: Snapshot, o: BuildOptions, before: StoreManifest) -> None:
    """Refuse a snapshot whose key type, or (when the columns are found by default) whose key
    columns, differ from the published run's store: a renamed column would otherwise be taken
    for another silently, and keys of another type cannot be matched for the warm start."""
    c = snap.columns
    if c.key_type != before.key_type:
        raise BadInputError(
            f"{snap.where}: keys are {c.key_type} but the published run's keys are {before.key_type}",
            hint="fix the export; to start over with the new key type, use a new --home",
        )
    if o.src is None and o.dst is None:
        was = (before.options.get("src"), before.options.get("dst"))
        if (c.src, c.dst) != was:
            raise BadInputError(
                f"{snap.where}: the key columns would be '{c.src}', '{c.dst}' but the published run "
                f"read '{was[0]}', '{was[1]}' (has the export's schema changed?)",
                hint="if the new columns are right, name them with --src and --dst",
            )


def teleport_hash(store: Path, o: RankOptions) -> str:
    """``teleport["hash"]`` that rank would record for ``o.teleport`` on ``store``."""
    if o.teleport is None:
        return "uniform"
    ids, vals, _ = load_teleport(StoreReader.open(store), o.teleport, o.ignore_unknown_keys)
    h = hashlib.sha256()
    for a in (ids, vals):
        h.update(a.tobytes())
    return h.hexdigest()


def delta_fingerprint(
    published: StoreManifest, add: Sequence[str | os.PathLike[str]],
    remove: Sequence[str | os.PathLike[str]],
) -> str:
    """The ``input["fingerprint"]`` of the store that patching the published store with this
    delta writes (ingest/patch.py records the same value; a test checks that they agree).

    When the published store is itself this delta applied to its base (the same delta given
    again), its own fingerprint: the refresh is then up to date. That is exact, not a guess:
    a patch is idempotent, ((E - R) | A) patched again with R and A is the same edge set.
    Reads every delta byte once (sha256).
    """
    add_fp, rem_fp = delta_input_fingerprints(published, add, remove)
    inp = published.input
    if (inp.get("add", {}).get("fingerprint"), inp.get("remove", {}).get("fingerprint")) == (
        add_fp["fingerprint"], rem_fp["fingerprint"]
    ):
        return str(inp["fingerprint"])
    return patched_fingerprint(published.fingerprint, add_fp, rem_fp)
