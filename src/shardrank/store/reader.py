"""Open a store memory-mapped and verify it (checksums and structural invariants)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import DamagedDataError
from . import layout
from .atomic import sha256_file
from .manifest import BlockInfo, StoreManifest, read_manifest

_DAMAGE_HINT = (
    "the store is damaged (disk fault, partial copy or tampering); rebuild it with "
    "`shardrank build ... --overwrite` or restore it from a copy"
)


@dataclass
class Shard:
    """One block's in-edges in CSR form, memory-mapped.

    ``offsets``: int64[n_nodes + 1], block-local; ``sources``: uint16/32/64[n_edges], the
    sources' read slots (:mod:`.slots`; ids in a version-1 store), ascending within each row;
    ``weights``: float64[n_edges] or None.
    """

    info: BlockInfo
    offsets: np.ndarray
    sources: np.ndarray
    weights: np.ndarray | None


def _load_npy(path: Path, name: str) -> np.ndarray:
    try:
        return np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as e:
        raise DamagedDataError(
            f"{path}: cannot be read as an array ({e})", hint=_DAMAGE_HINT
        ) from None


class StoreReader:
    """A verified, memory-mapped view of a store directory.

    Opening checks the manifest and every file's size (cheap); :meth:`verify_checksums` reads
    every byte; :meth:`verify` adds the structural invariants.
    """

    def __init__(self, path: Path, manifest: StoreManifest) -> None:
        self.path = path
        self.manifest = manifest
        self._keys: pa.Array | None = None

    # -- opening -----------------------------------------------------------------------------
    @classmethod
    def open(cls, path: str | Path, checksums: bool = False) -> StoreReader:
        p = Path(path)
        m = read_manifest(p)
        r = cls(p, m)
        r.check_sizes()
        if checksums:
            r.verify_checksums()
        return r

    def check_sizes(self) -> None:
        for name, info in self.manifest.files.items():
            f = self.path / name
            if not f.is_file():
                raise DamagedDataError(f"{f}: missing (listed in the manifest)", hint=_DAMAGE_HINT)
            size = f.stat().st_size
            if size != info.bytes:
                raise DamagedDataError(
                    f"{f}: size {size} bytes, manifest says {info.bytes} (truncated or altered)",
                    hint=_DAMAGE_HINT,
                )

    def verify_checksums(self, progress: Callable[[str, int, int], None] | None = None) -> None:
        items = sorted(self.manifest.files.items())
        for i, (name, info) in enumerate(items):
            if progress:
                progress(name, i, len(items))
            digest = sha256_file(self.path / name)
            if digest != info.sha256:
                raise DamagedDataError(
                    f"{self.path / name}: checksum mismatch (the file's bytes changed)",
                    hint=_DAMAGE_HINT,
                )

    # -- properties --------------------------------------------------------------------------
    @property
    def n_nodes(self) -> int:
        return self.manifest.n_nodes

    @property
    def n_edges(self) -> int:
        return self.manifest.n_edges

    @property
    def n_blocks(self) -> int:
        return len(self.manifest.blocks)

    @property
    def weighted(self) -> bool:
        return self.manifest.weighted

    @property
    def fingerprint(self) -> str:
        return self.manifest.fingerprint

    # -- arrays ------------------------------------------------------------------------------
    def out_degree(self) -> np.ndarray:
        """int64[N], memory-mapped."""
        return _load_npy(self.path / layout.OUT_DEGREE, "out_degree")

    def in_degree(self) -> np.ndarray:
        """int64[N], memory-mapped."""
        return _load_npy(self.path / layout.IN_DEGREE, "in_degree")

    def out_weight(self) -> np.ndarray:
        """float64[N] total out-weight (unweighted: the out-degree as float64), memory-mapped."""
        return _load_npy(self.path / layout.OUT_WEIGHT, "out_weight")

    def read_slot(self) -> np.ndarray | None:
        """uint[N] read slot of each node id, memory-mapped (see :mod:`.slots`); None for a
        version-1 store, whose shards hold ids (slot = id)."""
        if self.manifest.version < 2:
            return None
        if layout.READ_SLOT not in self.manifest.files:
            raise DamagedDataError(
                f"{self.path / layout.MANIFEST}: lists no {layout.READ_SLOT} (required since "
                "format version 2)", hint=_DAMAGE_HINT,
            )
        return _load_npy(self.path / layout.READ_SLOT, "read_slot")

    def shard(self, index: int) -> Shard:
        info = self.manifest.blocks[index]
        w = _load_npy(self.path / layout.shard_weights(index), "weights") if self.weighted else None
        return Shard(
            info=info,
            offsets=_load_npy(self.path / layout.shard_offsets(index), "offsets"),
            sources=_load_npy(self.path / layout.shard_sources(index), "sources"),
            weights=w,
        )

    def keys(self) -> pa.Array:
        """Node keys in id order (int64 or string Arrow array)."""
        if self._keys is None:
            path = self.path / layout.NODES
            try:
                t = pq.read_table(path, columns=["id", "key"])
            except (pa.ArrowInvalid, OSError) as e:
                raise DamagedDataError(f"{path}: unreadable ({e})", hint=_DAMAGE_HINT) from None
            self._keys = t.column("key").combine_chunks()
        return self._keys

    def nodes_path(self) -> Path:
        return self.path / layout.NODES

    def bytes_on_disk(self) -> int:
        return sum(f.bytes for f in self.manifest.files.values())
