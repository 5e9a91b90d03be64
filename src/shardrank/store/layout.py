"""The only code that knows the file names inside a store directory.

::

    STORE/
      manifest.json                       written last; a directory without it is not a store
      nodes.parquet                       id (int64, 0..N-1), key (int64 or string)
      out_degree.npy                      int64[N]   out-links per node (after normalisation)
      in_degree.npy                       int64[N]   in-links per node
      out_weight.npy                      float64[N] sum of out-link weights (or out-degree)
      read_slot.npy                       uint16|uint32|uint64[N] read slot of each id (v2+)
      shards/block-000000.offsets.npy     int64[n_b + 1]  CSR row offsets, block-local
      shards/block-000000.sources.npy     uint16|uint32|uint64[e_b]  sources' read slots
                                          (v1: ids), ascending per row (see store/slots.py)
      shards/block-000000.weights.npy     float64[e_b]  edge weights (weighted stores only)
"""

from __future__ import annotations

from pathlib import Path

MANIFEST = "manifest.json"
NODES = "nodes.parquet"
OUT_DEGREE = "out_degree.npy"
IN_DEGREE = "in_degree.npy"
OUT_WEIGHT = "out_weight.npy"
READ_SLOT = "read_slot.npy"
SHARD_DIR = "shards"


def shard_offsets(index: int) -> str:
    """Relative path of block ``index``'s CSR offsets."""
    return f"{SHARD_DIR}/block-{index:06d}.offsets.npy"


def shard_sources(index: int) -> str:
    """Relative path of block ``index``'s source ids."""
    return f"{SHARD_DIR}/block-{index:06d}.sources.npy"


def shard_weights(index: int) -> str:
    """Relative path of block ``index``'s edge weights."""
    return f"{SHARD_DIR}/block-{index:06d}.weights.npy"


def partial_dir(final: Path, pid: int) -> Path:
    """The temporary sibling a build writes into before renaming it to ``final``."""
    return final.parent / f".{final.name}.partial-{pid}"


def replaced_siblings(final: Path) -> list[Path]:
    """Earlier stores moved aside by an --overwrite publish (``.NAME.old-PID``, any pid)."""
    if not final.parent.exists():
        return []
    return sorted(final.parent.glob(f".{final.name}.old-*"))


def stale_partials(final: Path) -> list[Path]:
    """Temporary siblings of ``final`` left by earlier builds (any pid)."""
    if not final.parent.exists():
        return []
    return sorted(final.parent.glob(f".{final.name}.partial-*"))
