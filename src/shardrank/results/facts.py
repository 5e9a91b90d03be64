"""Facts about a store for `inspect` and reports (bounded memory: degree arrays only)."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..store import layout
from ..store.reader import StoreReader


def _block_files(i: int) -> tuple[str, str, str]:
    return layout.shard_offsets(i), layout.shard_sources(i), layout.shard_weights(i)


def _quantiles(a: np.ndarray) -> dict[str, float]:
    qs = {"min": 0.0, "p50": 0.5, "p90": 0.9, "p99": 0.99, "p999": 0.999, "max": 1.0}
    vals = np.quantile(a, list(qs.values())) if a.size else np.zeros(len(qs))
    return {k: float(v) for k, v in zip(qs, vals, strict=True)}


def store_facts(reader: StoreReader) -> dict[str, Any]:
    m = reader.manifest
    out_deg = np.asarray(reader.out_degree())
    in_deg = np.asarray(reader.in_degree())
    sizes = [b.n_edges for b in m.blocks]
    per_block = [
        {"index": b.index, "first_node": b.first_node, "nodes": b.n_nodes, "edges": b.n_edges,
         "bytes": sum(m.files[f].bytes for f in _block_files(b.index) if f in m.files)}
        for b in m.blocks
    ]
    return {
        "path": str(reader.path),
        "format": m.format,
        "version": m.version,
        "fingerprint": m.fingerprint,
        "created": m.created,
        "nodes": m.n_nodes,
        "edges": m.n_edges,
        "dead_ends": int(np.count_nonzero(out_deg == 0)),
        "no_in_links": int(np.count_nonzero(in_deg == 0)),
        "self_loops": int(m.counts.get("self_loops", 0)),
        "duplicates_merged": int(m.counts.get("duplicates_merged", 0)),
        "rows_read": int(m.counts.get("rows_read", 0)),
        "rows_dropped_null": int(m.counts.get("rows_dropped_null", 0)),
        "self_loop_rows_dropped": int(m.counts.get("self_loop_rows_dropped", 0)),
        "key_type": m.key_type,
        "weighted": m.weighted,
        "source_id_dtype": m.source_dtype,
        "out_degree": _quantiles(out_deg),
        "in_degree": _quantiles(in_deg),
        "blocks": {
            "count": len(m.blocks),
            "block_nodes": m.block_nodes,
            "edges_min": min(sizes),
            "edges_median": float(np.median(sizes)),
            "edges_max": max(sizes),
            "bytes_max": max(b["bytes"] for b in per_block),
            "sizes": per_block,
        },
        # every file of the store directory, manifest.json included
        "bytes_on_disk": reader.bytes_on_disk() + (reader.path / layout.MANIFEST).stat().st_size,
        "input_fingerprint": m.input.get("fingerprint"),
        "options": m.options,
    }
