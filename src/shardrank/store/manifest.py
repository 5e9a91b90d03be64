"""The versioned store manifest: one dataclass, one ``parse_*`` validator per field.

The manifest is the last file a build writes. A reader trusts nothing in a store that the
manifest does not describe (size and sha256 of every file).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from .. import settings
from ..errors import DamagedDataError

KEY_TYPES = ("int64", "string")
SOURCE_DTYPES = ("<u2", "<u4", "<u8")


@dataclass(frozen=True)
class BlockInfo:
    """One shard: the in-edges of destination ids ``first_node .. first_node + n_nodes - 1``."""

    index: int
    first_node: int
    n_nodes: int
    n_edges: int


@dataclass(frozen=True)
class FileInfo:
    """Size and checksum of one file of the store."""

    bytes: int
    sha256: str


@dataclass
class StoreManifest:
    """Everything a reader needs to know about a store; serialised as manifest.json."""

    n_nodes: int
    n_edges: int
    key_type: str
    weighted: bool
    source_dtype: str
    block_nodes: int
    blocks: list[BlockInfo]
    files: dict[str, FileInfo]
    input: dict[str, Any]
    options: dict[str, Any]
    counts: dict[str, int]
    created: str
    format: str = settings.STORE_FORMAT
    version: int = settings.STORE_FORMAT_VERSION
    fingerprint: str = field(default="")

    def compute_fingerprint(self) -> str:
        """sha256 over what defines the graph: counts, layout and every file's checksum."""
        core = {
            "n_nodes": self.n_nodes,
            "n_edges": self.n_edges,
            "key_type": self.key_type,
            "weighted": self.weighted,
            "source_dtype": self.source_dtype,
            "blocks": [asdict(b) for b in self.blocks],
            "files": {k: self.files[k].sha256 for k in sorted(self.files)},
        }
        return hashlib.sha256(json.dumps(core, sort_keys=True).encode()).hexdigest()

    def to_json(self) -> dict[str, Any]:
        d = asdict(self)
        order = [
            "format",
            "version",
            "fingerprint",
            "created",
            "n_nodes",
            "n_edges",
            "key_type",
            "weighted",
            "source_dtype",
            "block_nodes",
            "counts",
            "input",
            "options",
            "blocks",
            "files",
        ]
        return {k: d[k] for k in order}


SELF_CHECKSUM = "manifest_sha256"


def content_sha256(doc: dict[str, Any]) -> str:
    """sha256 of a manifest's contents without its own checksum field (canonical JSON).

    The fingerprint covers only what defines the graph; this covers every field (counts,
    options, input, creation time), so no edit of manifest.json goes unnoticed.
    """
    body = {k: v for k, v in doc.items() if k != SELF_CHECKSUM}
    return hashlib.sha256(
        json.dumps(body, sort_keys=True, separators=(",", ":")).encode()
    ).hexdigest()


def encode_manifest(m: StoreManifest) -> bytes:
    """The exact bytes of manifest.json: indented JSON, its own checksum after the fingerprint."""
    doc = m.to_json()
    digest = content_sha256(doc)
    out: dict[str, Any] = {}
    for k, v in doc.items():
        out[k] = v
        if k == "fingerprint":
            out[SELF_CHECKSUM] = digest
    return (json.dumps(out, indent=2) + "\n").encode()


def _damaged(path: Path, what: str) -> DamagedDataError:
    return DamagedDataError(
        f"{path}: {what}",
        hint="the store is damaged or was not written by shardrank; rebuild it with "
        "`shardrank build ... --overwrite`",
    )


def _int(d: dict[str, Any], key: str, path: Path, minimum: int = 0) -> int:
    v = d.get(key)
    if not isinstance(v, int) or isinstance(v, bool) or v < minimum:
        raise _damaged(path, f"field '{key}' must be an integer >= {minimum}, found {v!r}")
    return v


def parse_format(d: dict[str, Any], path: Path) -> tuple[str, int]:
    fmt, ver = d.get("format"), d.get("version")
    if fmt != settings.STORE_FORMAT:
        raise _damaged(path, f"not a shardrank store manifest (format={fmt!r})")
    if not isinstance(ver, int) or ver < 1:
        raise _damaged(path, f"bad format version {ver!r}")
    if ver > settings.STORE_FORMAT_VERSION:
        raise DamagedDataError(
            f"{path}: store format version {ver} is newer than this shardrank understands "
            f"({settings.STORE_FORMAT_VERSION})",
            hint="upgrade shardrank, or rebuild the store with this version",
        )
    return fmt, ver


def parse_blocks(d: dict[str, Any], path: Path, n_nodes: int, n_edges: int) -> list[BlockInfo]:
    raw = d.get("blocks")
    if not isinstance(raw, list):
        raise _damaged(path, "field 'blocks' must be a list")
    blocks: list[BlockInfo] = []
    next_first, total = 0, 0
    for i, b in enumerate(raw):
        if not isinstance(b, dict):
            raise _damaged(path, f"block {i} is not an object")
        info = BlockInfo(
            index=_int(b, "index", path),
            first_node=_int(b, "first_node", path),
            n_nodes=_int(b, "n_nodes", path, 1),
            n_edges=_int(b, "n_edges", path),
        )
        if info.index != i or info.first_node != next_first:
            raise _damaged(path, f"block {i} does not follow block {i - 1}")
        next_first += info.n_nodes
        total += info.n_edges
        blocks.append(info)
    if next_first != n_nodes or total != n_edges:
        raise _damaged(path, "blocks do not cover the node and edge counts")
    return blocks


def parse_files(d: dict[str, Any], path: Path) -> dict[str, FileInfo]:
    raw = d.get("files")
    if not isinstance(raw, dict):
        raise _damaged(path, "field 'files' must be an object")
    out: dict[str, FileInfo] = {}
    for name, f in raw.items():
        if not isinstance(f, dict) or ".." in Path(name).parts or Path(name).is_absolute():
            raise _damaged(path, f"bad file entry {name!r}")
        sha = f.get("sha256")
        if not isinstance(sha, str) or len(sha) != 64:
            raise _damaged(path, f"file {name!r} has no valid sha256")
        out[name] = FileInfo(bytes=_int(f, "bytes", path), sha256=sha)
    return out


def parse_manifest(d: Any, path: Path) -> StoreManifest:
    """Validate a decoded manifest.json, field by field."""
    if not isinstance(d, dict):
        raise _damaged(path, "manifest is not a JSON object")
    parse_format(d, path)
    if d.get(SELF_CHECKSUM) != content_sha256(d):
        raise _damaged(
            path, "checksum mismatch (the manifest's contents changed since it was written)"
        )
    n_nodes = _int(d, "n_nodes", path, 1)
    n_edges = _int(d, "n_edges", path)
    key_type = d.get("key_type")
    if key_type not in KEY_TYPES:
        raise _damaged(path, f"key_type must be one of {KEY_TYPES}, found {key_type!r}")
    src = d.get("source_dtype")
    if src not in SOURCE_DTYPES:
        raise _damaged(path, f"source_dtype must be one of {SOURCE_DTYPES}, found {src!r}")
    weighted = d.get("weighted")
    if not isinstance(weighted, bool):
        raise _damaged(path, "field 'weighted' must be true or false")
    for k in ("input", "options", "counts"):
        if not isinstance(d.get(k), dict):
            raise _damaged(path, f"field '{k}' must be an object")
    m = StoreManifest(
        n_nodes=n_nodes,
        n_edges=n_edges,
        key_type=key_type,
        weighted=weighted,
        source_dtype=src,
        block_nodes=_int(d, "block_nodes", path, 1),
        blocks=parse_blocks(d, path, n_nodes, n_edges),
        files=parse_files(d, path),
        input=d["input"],
        options=d["options"],
        counts=d["counts"],
        created=str(d.get("created", "")),
        version=d["version"],
        fingerprint=str(d.get("fingerprint", "")),
    )
    if m.fingerprint != m.compute_fingerprint():
        raise _damaged(path, "fingerprint does not match the manifest's contents")
    return m


def read_manifest(store: Path) -> StoreManifest:
    """Read and validate ``STORE/manifest.json``."""
    from . import layout

    path = store / layout.MANIFEST
    if not store.exists():
        from ..errors import BadInputError

        raise BadInputError(f"{store}: no such store", hint="build one with `shardrank build`")
    if not path.is_file():
        raise DamagedDataError(
            f"{store}: not a shardrank store (no {layout.MANIFEST}); an interrupted build "
            "never leaves a manifest",
            hint="build it again with `shardrank build ... --out STORE --overwrite`",
        )
    raw = path.read_bytes()
    try:
        d = json.loads(raw)
    except (ValueError, UnicodeDecodeError) as e:
        raise _damaged(path, f"manifest is not valid JSON ({e})") from None
    m = parse_manifest(d, path)
    # the checksum covers the contents; this covers the bytes (whitespace, escapes) as written
    if raw != (json.dumps(d, indent=2) + "\n").encode():
        raise _damaged(
            path, "the file's bytes differ from what shardrank wrote (formatting changed)"
        )
    return m
