"""Write a store into a temporary directory, block by block, then publish it atomically.

The caller streams edges sorted by destination (then source id); the writer turns source ids
into read slots (see :mod:`shardrank.store.slots`), sorts each row by slot, cuts the rows into
blocks, hashes every byte as it writes, and writes manifest.json last.
"""

from __future__ import annotations

import os
from datetime import UTC, datetime
from pathlib import Path
from typing import IO, Any

import numpy as np

from ..kernels.slots import relabel_rows
from . import layout
from .atomic import (
    HashingWriter,
    npy_header,
    publish_dir,
    sha256_file,
    write_bytes_atomic,
    write_npy_atomic,
)
from .manifest import BlockInfo, FileInfo, StoreManifest, encode_manifest
from .slots import slot_order


class _StreamFile:
    """A .npy file of known length written sequentially through a hashing writer."""

    def __init__(self, path: Path, dtype: np.dtype, n: int) -> None:
        self.path = path
        self.dtype = np.dtype(dtype).newbyteorder("<")
        self.expected = n
        self.written = 0
        self._f: IO[bytes] = open(path, "wb")
        self._w = HashingWriter(self._f)
        self._w.write(npy_header(self.dtype, n))

    def write(self, arr: np.ndarray) -> None:
        a = np.ascontiguousarray(arr, dtype=self.dtype)
        self.written += a.shape[0]
        if self.written > self.expected:
            raise RuntimeError(f"{self.path}: more items than announced ({self.expected})")
        self._w.write(a.data.cast("B"))

    def close(self) -> FileInfo:
        if self.written != self.expected:
            raise RuntimeError(
                f"{self.path}: {self.written} items written, {self.expected} announced"
            )
        self._f.flush()
        os.fsync(self._f.fileno())
        self._f.close()
        return FileInfo(bytes=self._w.n_bytes, sha256=self._w.hexdigest())


class StoreWriter:
    """Builds one store in ``tmp`` (a sibling of its final path)."""

    def __init__(
        self, tmp: Path, n_nodes: int, block_nodes: int, source_dtype: str, weighted: bool
    ):
        self.tmp = tmp
        self.n_nodes = n_nodes
        self.block_nodes = block_nodes
        self.source_dtype = np.dtype(source_dtype)
        self.weighted = weighted
        self.files: dict[str, FileInfo] = {}
        self.blocks: list[BlockInfo] = []
        (tmp / layout.SHARD_DIR).mkdir(parents=True, exist_ok=True)
        self._cur = -1
        self._src: _StreamFile | None = None
        self._wgt: _StreamFile | None = None
        self._slot: np.ndarray | None = None
        # the last row of the previous batch: the next batch may continue it
        self._tail: tuple[np.ndarray, np.ndarray, np.ndarray | None] | None = None
        self.n_edges = 0

    # -- whole arrays --------------------------------------------------------------------------
    def write_array(self, name: str, arr: np.ndarray) -> None:
        n_bytes, sha = write_npy_atomic(self.tmp / name, arr)
        self.files[name] = FileInfo(bytes=n_bytes, sha256=sha)

    def add_file(self, name: str) -> None:
        """Register a file already written into the temporary directory (e.g. by DuckDB)."""
        p = self.tmp / name
        self.files[name] = FileInfo(bytes=p.stat().st_size, sha256=sha256_file(p))

    # -- shards --------------------------------------------------------------------------------
    def begin_shards(self, in_degree: np.ndarray, out_degree: np.ndarray) -> None:
        """Write the read slots (from the out-degrees) and every block's offsets (from the
        in-degrees), which fixes the block boundaries."""
        self._slot = slot_order(out_degree, self.source_dtype)
        self.write_array(layout.READ_SLOT, self._slot)
        n, bn = self.n_nodes, self.block_nodes
        for i, first in enumerate(range(0, n, bn)):
            deg = in_degree[first : first + bn]
            off = np.zeros(deg.shape[0] + 1, dtype=np.int64)
            np.cumsum(deg, out=off[1:])
            self.write_array(layout.shard_offsets(i), off)
            self.blocks.append(BlockInfo(i, first, int(deg.shape[0]), int(off[-1])))

    def _open_block(self, i: int) -> None:
        self._close_block()
        b = self.blocks[i]
        self._src = _StreamFile(self.tmp / layout.shard_sources(i), self.source_dtype, b.n_edges)
        if self.weighted:
            self._wgt = _StreamFile(
                self.tmp / layout.shard_weights(i), np.dtype(np.float64), b.n_edges
            )
        self._cur = i

    def _close_block(self) -> None:
        if self._src is not None:
            self.files[layout.shard_sources(self._cur)] = self._src.close()
            self._src = None
        if self._wgt is not None:
            self.files[layout.shard_weights(self._cur)] = self._wgt.close()
            self._wgt = None

    def add_edges(self, dst: np.ndarray, src: np.ndarray, weight: np.ndarray | None) -> None:
        """Append a batch of edges (source ids); batches must arrive sorted by destination."""
        m = dst.shape[0]
        if m == 0:
            return
        start = 0
        if self._tail is not None:
            # the held-back row, joined by its continuation at the head of this batch
            td, ts, tw = self._tail
            self._tail = None
            start = int(np.searchsorted(dst, td[0], side="right")) if dst[0] == td[0] else 0
            if start == m:  # the whole batch continues the row: keep holding it
                self._tail = (np.concatenate([td, dst]), np.concatenate([ts, src]),
                              None if tw is None or weight is None else np.concatenate([tw, weight]))
                return
            self._write_rows(np.concatenate([td, dst[:start]]), np.concatenate([ts, src[:start]]),
                             None if tw is None or weight is None else np.concatenate([tw, weight[:start]]))
        # hold back the batch's last row (its edges may go on in the next batch)
        cut = max(start, int(np.searchsorted(dst, dst[-1], side="left")))
        self._tail = (dst[cut:].copy(), src[cut:].copy(), None if weight is None else weight[cut:].copy())
        self._write_rows(dst[start:cut], src[start:cut], None if weight is None else weight[start:cut])

    def _write_rows(self, dst: np.ndarray, src: np.ndarray, weight: np.ndarray | None) -> None:
        """Write whole rows: sources become slots, sorted within each row."""
        m = dst.shape[0]
        if m == 0:
            return
        assert self._slot is not None, "begin_shards() first"
        row_ptr = np.concatenate([[0], np.flatnonzero(np.diff(dst)) + 1, [m]]).astype(np.int64)
        slots = np.empty(m, dtype=self.source_dtype)
        w_in = np.empty(0) if weight is None else np.ascontiguousarray(weight, dtype=np.float64)
        w_sorted = np.empty(w_in.shape[0])
        relabel_rows(row_ptr, np.ascontiguousarray(src), self._slot, w_in, slots, w_sorted)
        blk = dst // self.block_nodes
        # cut the batch where the block changes (dst is sorted, so blk is too)
        cuts = np.flatnonzero(np.diff(blk)) + 1
        starts = np.concatenate([[0], cuts])
        ends = np.concatenate([cuts, [m]])
        for s, e in zip(starts.tolist(), ends.tolist(), strict=True):
            b = int(blk[s])
            while self._cur < b:
                self._open_block(self._cur + 1)
            assert self._src is not None
            self._src.write(slots[s:e])
            if self._wgt is not None and weight is not None:
                self._wgt.write(w_sorted[s:e])
        self.n_edges += m

    def finish_shards(self) -> None:
        if self._tail is not None:
            self._write_rows(*self._tail)
            self._tail = None
        while self._cur < len(self.blocks) - 1:
            self._open_block(self._cur + 1)
        self._close_block()

    # -- manifest ------------------------------------------------------------------------------
    def write_manifest(
        self,
        key_type: str,
        input_info: dict[str, Any],
        options: dict[str, Any],
        counts: dict[str, int],
    ) -> StoreManifest:
        m = StoreManifest(
            n_nodes=self.n_nodes,
            n_edges=self.n_edges,
            key_type=key_type,
            weighted=self.weighted,
            source_dtype=self.source_dtype.newbyteorder("<").str,
            block_nodes=self.block_nodes,
            blocks=self.blocks,
            files=dict(sorted(self.files.items())),
            input=input_info,
            options=options,
            counts=counts,
            created=datetime.now(UTC).isoformat(timespec="seconds"),
        )
        m.fingerprint = m.compute_fingerprint()
        write_bytes_atomic(self.tmp / layout.MANIFEST, encode_manifest(m))
        return m

    def publish(self, final: Path, overwrite: bool) -> None:
        publish_dir(self.tmp, final, overwrite)
