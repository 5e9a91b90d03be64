"""Resolve EDGES arguments (files, directories, globs) into typed input files for DuckDB."""

from __future__ import annotations

import glob
import hashlib
import os
from dataclasses import dataclass
from pathlib import Path

from ..errors import BadInputError
from ..store import layout
from ..store.atomic import sha256_file

PARQUET_EXT = (".parquet", ".parq", ".pq")
TEXT_EXT = (".csv", ".tsv", ".txt", ".edges", ".el")
COMPRESSED = (".gz", ".zst")


@dataclass(frozen=True)
class InputFile:
    path: Path
    kind: str  # "parquet" | "csv"
    delim: str | None = None  # text files: the delimiter decided by tables.sniff_text
    header: bool | None = None  # text files: whether the first line names the columns


def _kind_of(path: Path) -> str:
    """Parquet by magic number, text edge list by extension or content; else an error."""
    try:
        with open(path, "rb") as f:
            head = f.read(4096)
    except OSError as e:
        raise BadInputError(f"{path}: cannot be read ({e.strerror})") from None
    if not head:
        raise BadInputError(
            f"{path}: is empty (0 bytes)", hint="remove it from the inputs or re-export it"
        )
    if head[:4] == b"PAR1":
        return "parquet"
    name = path.name.lower()
    for c in COMPRESSED:
        if name.endswith(c):
            name = name[: -len(c)]
            break
    else:
        if b"\x00" in head:
            raise BadInputError(
                f"{path}: is neither Parquet nor a CSV/TSV edge list (binary content)",
                hint="pass Parquet files or text edge lists (.csv, .tsv, optionally .gz/.zst)",
            )
    if name.endswith(PARQUET_EXT):
        raise BadInputError(
            f"{path}: has a Parquet name but is not a Parquet file (bad magic number)",
            hint="the file is corrupt or truncated; re-export it",
        )
    return "csv"


def _is_data_file(p: Path) -> bool:
    n = p.name
    if n.startswith((".", "_")):  # _SUCCESS, .crc and other engine droppings
        return False
    low = n.lower()
    for c in COMPRESSED:
        if low.endswith(c):
            low = low[: -len(c)]
    return low.endswith(PARQUET_EXT + TEXT_EXT)


def _walk_visible(top: Path) -> list[tuple[str, list[str]]]:
    """(directory, file names) under ``top``, skipping hidden directories.

    Writers keep unfinished or failed output in ``_temporary``, ``.spark-staging`` and the like
    (and a build keeps its own ``.STORE.partial-PID``); reading them would duplicate edges.
    Stores are skipped too: their nodes.parquet is not an edge table.
    """
    out = []
    for root, dirs, fs in os.walk(top):
        if (
            layout.MANIFEST in fs and layout.SHARD_DIR in dirs
        ):  # a store (say, built into its input dir)
            dirs[:] = []
            continue
        dirs[:] = [d for d in dirs if not d.startswith((".", "_"))]
        out.append((root, fs))
    return out


def resolve_inputs(args: list[str]) -> list[InputFile]:
    """Expand files, directories (recursively, hive layout included) and globs, in sorted order."""
    if not args:
        raise BadInputError(
            "no edge files given", hint="pass one or more Parquet/CSV files or directories"
        )
    files: list[Path] = []
    for a in args:
        if any(ch in a for ch in "*?[") and not Path(a).exists():  # a name may hold "[1]"
            hits = sorted(Path(h) for h in glob.glob(a, recursive=True) if Path(h).is_file())
            if not hits:
                raise BadInputError(
                    f"{a}: no files match this pattern", hint="check the path and quoting"
                )
            files.extend(hits)
            continue
        p = Path(a)
        if not p.exists():
            raise BadInputError(f"{a}: no such file or directory", hint="check the path")
        if p.is_dir():
            hits = sorted(
                Path(root) / f
                for root, fs in _walk_visible(p)
                for f in fs
                if _is_data_file(Path(f))
            )
            if not hits:
                raise BadInputError(
                    f"{a}: directory holds no Parquet or CSV/TSV files",
                    hint="edge files end in .parquet, .csv, .tsv (optionally .gz/.zst)",
                )
            files.extend(hits)
        else:
            files.append(p)
    seen: set[Path] = set()
    out: list[InputFile] = []
    for f in files:
        rp = f.resolve()
        if rp in seen:
            continue
        seen.add(rp)
        out.append(InputFile(f, _kind_of(f)))
    return out


def fingerprint_inputs(files: list[InputFile], options: dict[str, object]) -> dict[str, object]:
    """Content fingerprint of the inputs (sha256 of each file, order-independent) and options."""
    digests = []
    total = 0
    for f in files:
        total += f.path.stat().st_size
        digests.append(sha256_file(f.path))
    top = hashlib.sha256()
    for d in sorted(digests):
        top.update(d.encode())
    top.update(repr(sorted(options.items())).encode())
    return {
        "fingerprint": top.hexdigest(),
        "n_files": len(files),
        "bytes": total,
        "files": [str(f.path) for f in files[:50]],
    }
