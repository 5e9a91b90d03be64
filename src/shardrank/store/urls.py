"""Where a store lives: a local path, or any URL that fsspec can open.

A plain path or a ``file://`` URL is a local directory (a local disk or an NFS mount): it is
memory-mapped as usual and needs no extra package. Every other URL (``s3://bucket/crawl.store``
with s3fs installed, or a chained URL such as ``simplecache::file:///mnt/share/crawl.store``)
goes through fsspec (``pip install 'shardrank[dask]'``):

- writing: the store is built in a local temporary directory, then :func:`upload_store` copies
  it file by file, ``manifest.json`` last. A prefix without a manifest is not a store, so a
  reader never sees half an upload.
- reading: :class:`StoreMirror` opens the store through a local cache directory that fills on
  demand: the manifest first, the node-sized files (keys, degrees, out-weights) when asked for,
  a shard's files when the shard is first used. Every file is checked against the manifest's
  size and sha256 before it is used, so a damaged copy is never computed on.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import unquote, urlparse

from ..errors import BadInputError, DamagedDataError
from . import layout
from .atomic import fsync_dir, sha256_file, write_bytes_atomic
from .manifest import FileInfo, StoreManifest, parse_manifest
from .reader import Shard, StoreReader

# where a driver keeps its mirror of stores at non-local URLs: one directory per fingerprint
CACHE_ENV = "SHARDRANK_CACHE_DIR"
DEFAULT_CACHE = Path("~/.cache/shardrank/stores")
HEAD_FILES = (layout.NODES, layout.OUT_DEGREE, layout.IN_DEGREE, layout.OUT_WEIGHT, layout.READ_SLOT)
_COPY_CHUNK = 1 << 22  # bytes per read while streaming a file


@dataclass(frozen=True)
class Location:
    """A directory given as a path or URL. ``local`` is set when it is a local directory."""

    url: str
    local: Path | None

    @property
    def is_local(self) -> bool:
        return self.local is not None

    def child(self, rel: str) -> Location:
        """The location of ``rel`` (a relative '/'-separated name) inside this one."""
        if self.local is not None:
            return Location(str(self.local / rel), self.local / rel)
        return Location(f"{self.url.rstrip('/')}/{rel}", None)

    def __str__(self) -> str:
        return self.url


def parse_location(where: str | os.PathLike[str]) -> Location:
    """A :class:`Location` from a path or URL; local paths are made absolute."""
    s = os.fspath(where)
    if "://" not in s and "::" not in s:
        p = Path(s).expanduser().absolute()
        return Location(str(p), p)
    if s.startswith("file://") and "::" not in s:
        u = urlparse(s)
        if u.netloc not in ("", "localhost"):
            raise BadInputError(f"{s}: a file:// URL must name a local path (file:///path)")
        p = Path(unquote(u.path))
        return Location(str(p), p)
    return Location(s, None)


def _fsspec() -> Any:
    try:
        import fsspec
    except ImportError:
        raise BadInputError(
            "URLs other than local paths need the package 'fsspec', which is not installed",
            hint="pip install 'shardrank[dask]'",
        ) from None
    return fsspec


def filesystem(loc: Location) -> tuple[Any, str]:
    """The fsspec filesystem and the path inside it for ``loc``."""
    fsspec = _fsspec()
    try:
        return fsspec.core.url_to_fs(loc.local if loc.local is not None else loc.url)
    except ImportError as e:
        raise BadInputError(
            f"{loc}: {e}",
            hint="install the fsspec backend for this protocol (e.g. pip install s3fs for s3://)",
        ) from None
    except ValueError as e:
        raise BadInputError(
            f"{loc}: {e}", hint="use a local path or a URL fsspec knows (s3://, gs://, ...)"
        ) from None


def read_bytes(loc: Location) -> bytes:
    """The whole content of the file at ``loc``."""
    if loc.local is not None:
        return loc.local.read_bytes()
    fs, path = filesystem(loc)
    data: bytes = fs.cat_file(path)
    return data


def exists(loc: Location) -> bool:
    if loc.local is not None:
        return loc.local.exists()
    fs, path = filesystem(loc)
    return bool(fs.exists(path))


def remove_tree(loc: Location) -> None:
    """Remove the directory (or prefix) ``loc`` and everything under it; missing is fine."""
    if loc.local is not None:
        shutil.rmtree(loc.local, ignore_errors=True)
        return
    fs, path = filesystem(loc)
    if fs.exists(path):
        fs.rm(path, recursive=True)


def describe(where: str | os.PathLike[str]) -> str:
    """How a run records its store: an absolute path (symlinks resolved), or the URL as given."""
    loc = parse_location(where)
    return str(loc.local.resolve()) if loc.local is not None else loc.url


# -- writing a store to a URL ------------------------------------------------------------------
def check_writable(dest: Location, overwrite: bool) -> None:
    """Refuse early when anything is at ``dest`` (a store, half an upload, other files) and
    ``overwrite`` is off, as a local build refuses an existing directory."""
    if not overwrite and exists(dest):
        what = "a store" if exists(dest.child(layout.MANIFEST)) else "files (not a store)"
        raise BadInputError(
            f"{dest} already holds {what}",
            hint="pass --overwrite to replace it, or pick another --out",
        )


def upload_store(src: Path, dest: Location, overwrite: bool) -> None:
    """Copy the finished store directory ``src`` to ``dest``, ``manifest.json`` last.

    An old store at ``dest`` loses its manifest first (so it stops being a store), then its
    files. Each uploaded file's size is checked against the local copy.
    """
    check_writable(dest, overwrite)
    fs, root = filesystem(dest)
    old_manifest = f"{root}/{layout.MANIFEST}"
    if fs.exists(old_manifest):
        fs.rm(old_manifest)
    if fs.exists(root):
        fs.rm(root, recursive=True)
    names = sorted(str(p.relative_to(src).as_posix()) for p in src.rglob("*") if p.is_file())
    names = [n for n in names if n != layout.MANIFEST] + [layout.MANIFEST]
    for name in names:
        target = f"{root}/{name}"
        fs.makedirs(target.rsplit("/", 1)[0], exist_ok=True)
        with open(src / name, "rb") as f_in, fs.open(target, "wb") as f_out:
            shutil.copyfileobj(f_in, f_out, _COPY_CHUNK)
        size = (src / name).stat().st_size
        if int(fs.info(target)["size"]) != size:
            raise DamagedDataError(
                f"{dest}/{name}: uploaded size differs from the local {size} bytes",
                hint="check the storage and upload again with --overwrite",
            )


# -- reading a store at a URL ------------------------------------------------------------------
def fetch_file(src: Location, dest: Path, info: FileInfo) -> Path:
    """Copy ``src`` to the local file ``dest`` unless it is already there; check size and sha256.

    The copy is written beside ``dest`` and renamed only after it verifies, so a file present
    at ``dest`` was verified when it arrived (a cache may be shared by several processes).
    """
    if dest.is_file() and dest.stat().st_size == info.bytes:
        return dest
    fs, path = filesystem(src)
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(f"{dest.name}.partial-{os.getpid()}-{threading.get_ident()}")
    h = hashlib.sha256()
    n = 0
    try:
        with fs.open(path, "rb") as f_in, open(tmp, "wb") as f_out:
            while chunk := f_in.read(_COPY_CHUNK):
                h.update(chunk)
                f_out.write(chunk)
                n += len(chunk)
        if n != info.bytes or h.hexdigest() != info.sha256:
            raise DamagedDataError(
                f"{src}: {n} bytes with a different checksum than the manifest lists",
                hint="the store at this URL is damaged or was replaced; rebuild or re-upload it",
            )
        os.replace(tmp, dest)
    except FileNotFoundError:
        raise DamagedDataError(
            f"{src}: missing (listed in the manifest)",
            hint="the store at this URL is incomplete; rebuild or re-upload it",
        ) from None
    finally:
        tmp.unlink(missing_ok=True)
    return dest


def cache_root() -> Path:
    """Where a driver mirrors stores at URLs: $SHARDRANK_CACHE_DIR or ~/.cache/shardrank/stores."""
    return Path(os.environ.get(CACHE_ENV) or DEFAULT_CACHE).expanduser()


class StoreMirror(StoreReader):
    """A store at a non-local URL, read through a local directory that fills on demand.

    ``path`` is the local mirror (one per store fingerprint, so a replaced store never mixes
    with an old copy); ``location`` is the URL. Each file is fetched once and verified
    against the manifest before it is used.
    """

    def __init__(self, path: Path, manifest: StoreManifest, location: Location) -> None:
        super().__init__(path, manifest)
        self.location = location

    @classmethod
    def open_url(cls, loc: Location, cache: Path | None = None) -> StoreMirror:
        """Read and check the manifest at ``loc``; mirror into ``cache`` (or :func:`cache_root`)."""
        mloc = loc.child(layout.MANIFEST)
        try:
            raw = read_bytes(mloc)
        except FileNotFoundError:
            if not exists(loc):
                raise BadInputError(
                    f"{loc}: no such store", hint="build one with `shardrank build`"
                ) from None
            raise DamagedDataError(
                f"{loc}: not a shardrank store (no {layout.MANIFEST}); an interrupted "
                "upload never leaves a manifest",
                hint="build it again with `shardrank build ... --out URL --overwrite`",
            ) from None
        try:
            d = json.loads(raw)
        except (ValueError, UnicodeDecodeError) as e:
            raise DamagedDataError(
                f"{mloc}: manifest is not valid JSON ({e})", hint="rebuild or re-upload the store"
            ) from None
        m = parse_manifest(d, mloc)  # type: ignore[arg-type]  # only printed in messages
        path = (cache or cache_root()) / m.fingerprint[:32]
        path.mkdir(parents=True, exist_ok=True)
        if not (path / layout.MANIFEST).is_file():
            # several processes (the Dask workers of one machine) may open the same store at
            # once: each writes its own temporary file, and the renames replace equal bytes
            tmp = path / f"{layout.MANIFEST}.partial-{os.getpid()}-{threading.get_ident()}"
            try:
                write_bytes_atomic(tmp, raw)
                os.replace(tmp, path / layout.MANIFEST)
            finally:
                tmp.unlink(missing_ok=True)
            fsync_dir(path)
        return cls(path, m, loc)

    def ensure(self, name: str) -> Path:
        """The local copy of the store's file ``name``, fetched and verified if missing."""
        info = self.manifest.files.get(name)
        if info is None:
            raise DamagedDataError(
                f"{self.location}: the manifest lists no {name}",
                hint="the store is damaged; rebuild or re-upload it",
            )
        return fetch_file(self.location.child(name), self.path / name, info)

    def check_sizes(self) -> None:
        """Every listed file is at the URL with its listed size (one listing, no download)."""
        fs, root = filesystem(self.location)
        found = {str(k)[len(root) :].lstrip("/"): v for k, v in fs.find(root, detail=True).items()}
        for name, info in self.manifest.files.items():
            got = found.get(name)
            if got is None:
                raise DamagedDataError(
                    f"{self.location}/{name}: missing (listed in the manifest)",
                    hint="the store at this URL is incomplete; rebuild or re-upload it",
                )
            if int(got["size"]) != info.bytes:
                raise DamagedDataError(
                    f"{self.location}/{name}: size {got['size']} bytes, manifest says {info.bytes}",
                    hint="rebuild or re-upload the store",
                )

    def verify_checksums(self, progress: Any = None) -> None:
        """Verify the node-sized files and every mirrored shard file; shards not yet mirrored
        are verified when they are fetched (that is what keeps a driver from downloading them)."""
        names = [
            n for n in sorted(self.manifest.files) if n in HEAD_FILES or (self.path / n).is_file()
        ]
        names = [n for n in names if n != layout.MANIFEST]
        for i, name in enumerate(names):
            if progress:
                progress(name, i, len(names))
            self.ensure(name)
            if sha256_file(self.path / name) != self.manifest.files[name].sha256:
                (self.path / name).unlink(missing_ok=True)  # a damaged cached copy is fetched again
                self.ensure(name)
        fsync_dir(self.path)

    def out_degree(self) -> Any:
        self.ensure(layout.OUT_DEGREE)
        return super().out_degree()

    def in_degree(self) -> Any:
        self.ensure(layout.IN_DEGREE)
        return super().in_degree()

    def out_weight(self) -> Any:
        self.ensure(layout.OUT_WEIGHT)
        return super().out_weight()

    def read_slot(self) -> Any:
        if layout.READ_SLOT in self.manifest.files:
            self.ensure(layout.READ_SLOT)
        return super().read_slot()

    def keys(self) -> Any:
        self.ensure(layout.NODES)
        return super().keys()

    def nodes_path(self) -> Path:
        return self.ensure(layout.NODES)

    def shard(self, index: int) -> Shard:
        self.ensure(layout.shard_offsets(index))
        self.ensure(layout.shard_sources(index))
        if self.weighted:
            self.ensure(layout.shard_weights(index))
        return super().shard(index)


def open_store(where: str | os.PathLike[str], cache: Path | None = None) -> StoreReader:
    """Open the store at a path or URL: memory-mapped in place when local, else mirrored."""
    loc = parse_location(where)
    if loc.local is not None:
        return StoreReader.open(loc.local)
    reader = StoreMirror.open_url(loc, cache)
    reader.check_sizes()
    return reader


def location_of(reader: StoreReader) -> Location:
    """Where a worker finds the store ``reader`` reads (its URL, or its absolute path)."""
    loc = getattr(reader, "location", None)
    return loc if isinstance(loc, Location) else parse_location(reader.path)
