"""Atomic, durable file operations: write a ``.partial`` sibling, fsync, rename, fsync the dir.

Nothing above this module thinks about torn files.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import IO, Any

import numpy as np


def fsync_dir(path: Path) -> None:
    """Flush a directory entry (the rename of a child) to disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class HashingWriter:
    """A binary file writer that hashes every byte it writes (sha256)."""

    def __init__(self, f: IO[bytes]) -> None:
        self._f = f
        self._h = hashlib.sha256()
        self.n_bytes = 0

    def write(self, data: bytes | memoryview) -> int:
        self._h.update(data)
        self._f.write(data)
        self.n_bytes += len(data)
        return len(data)

    def hexdigest(self) -> str:
        return self._h.hexdigest()


@contextmanager
def atomic_open(path: Path) -> Iterator[HashingWriter]:
    """Open ``path`` for writing through a ``.partial`` sibling; publish on clean exit only."""
    tmp = path.with_name(path.name + ".partial")
    f = open(tmp, "wb")
    try:
        w = HashingWriter(f)
        yield w
        f.flush()
        os.fsync(f.fileno())
        f.close()
        os.replace(tmp, path)
        fsync_dir(path.parent)
    except BaseException:
        f.close()
        tmp.unlink(missing_ok=True)
        raise


def write_bytes_atomic(path: Path, data: bytes) -> str:
    """Write ``data`` to ``path`` atomically; return its sha256."""
    with atomic_open(path) as w:
        w.write(data)
    return w.hexdigest()


def write_json_atomic(path: Path, obj: Any) -> str:
    """Write ``obj`` as indented JSON atomically; return the sha256 of the bytes."""
    return write_bytes_atomic(path, (json.dumps(obj, indent=2, sort_keys=False) + "\n").encode())


def npy_header(dtype: np.dtype, n: int) -> bytes:
    """The .npy (format 1.0) header for a 1-D little-endian array of ``n`` items."""
    import io

    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": np.dtype(dtype).newbyteorder("<").str, "fortran_order": False, "shape": (n,)}
    )
    return buf.getvalue()


def write_npy_atomic(path: Path, arr: np.ndarray) -> tuple[int, str]:
    """Write a 1-D array as .npy atomically (no pickle); return (bytes, sha256)."""
    a = np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<"))
    with atomic_open(path) as w:
        w.write(npy_header(a.dtype, a.shape[0]))
        w.write(a.data.cast("B"))  # the array's own buffer, no copy
    return w.n_bytes, w.hexdigest()


def sha256_file(path: Path, chunk: int = 1 << 22) -> str:
    """sha256 of a file, streamed."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while True:
            b = f.read(chunk)
            if not b:
                break
            h.update(b)
    return h.hexdigest()


def fsync_tree(root: Path) -> None:
    """fsync every file and directory under ``root`` (before renaming it into place)."""
    for dirpath, _dirs, files in os.walk(root):
        for name in files:
            fd = os.open(os.path.join(dirpath, name), os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        fsync_dir(Path(dirpath))


def publish_dir(tmp: Path, final: Path, overwrite: bool) -> None:
    """Rename a finished temporary directory into place (replacing ``final`` if allowed)."""
    fsync_tree(tmp)
    if final.exists():
        if not overwrite:
            raise FileExistsError(final)
        old = final.with_name(f".{final.name}.old-{os.getpid()}")
        os.replace(final, old)
        os.replace(tmp, final)
        fsync_dir(final.parent)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, final)
        fsync_dir(final.parent)
