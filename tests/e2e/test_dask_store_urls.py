"""Stores at fsspec URLs (no cluster needed): locations, upload, verified mirror, damage.

``simplecache::file://DIR`` is a real fsspec filesystem over a local directory that cannot be
memory-mapped in place: it stands in for object storage (s3fs is not installed here).
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

import shardrank
from shardrank import BuildOptions, RankOptions
from shardrank.cli.main import main
from shardrank.store import urls

pytest.importorskip("fsspec")


def _edges(tmp: Path) -> Path:
    f = tmp / "links.csv"
    rows = ["src,dst"] + [
        f"page-{i % 40}.example,page-{(i * 7 + 3) % 50}.example" for i in range(300)
    ]
    f.write_text("\n".join(rows) + "\n")
    return f


def _forget_uploads() -> None:
    """simplecache:: serves what this process wrote from its own cache (a reader on another
    machine never has it): drop its instances so the next read sees the directory."""
    from fsspec.implementations.cached import SimpleCacheFileSystem

    SimpleCacheFileSystem.clear_instance_cache()


@pytest.fixture
def url_store(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> tuple[str, Path]:
    monkeypatch.setenv(urls.CACHE_ENV, str(tmp_path / "cache"))
    url = f"simplecache::file://{tmp_path}/share/links.store"
    assert main(["build", str(_edges(tmp_path)), "--out", url, "--block-nodes", "16", "-q"]) == 0
    return url, tmp_path / "share" / "links.store"


def test_locations(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    assert urls.parse_location("rel/crawl.store").local == tmp_path / "rel" / "crawl.store"
    assert urls.parse_location("file:///mnt/share/crawl.store").local == Path(
        "/mnt/share/crawl.store"
    )
    assert urls.parse_location("file:///mnt/a%20b").local == Path("/mnt/a b")
    for remote in ("s3://bucket/crawl.store", "simplecache::file:///mnt/x", "gs://b/k"):
        loc = urls.parse_location(remote)
        assert loc.local is None and loc.url == remote
    assert (
        urls.parse_location("s3://b/x").child("shards/block-000001.offsets.npy").url
        == "s3://b/x/shards/block-000001.offsets.npy"
    )


def test_url_store_ranks_like_the_local_copy(tmp_path: Path, url_store: tuple[str, Path]) -> None:
    url, remote_dir = url_store
    shardrank.build_store(
        [_edges(tmp_path)], tmp_path / "local.store", BuildOptions(block_nodes=16)
    )
    a = shardrank.rank(url, tmp_path / "a", RankOptions())  # local engine: shards fetched on demand
    b = shardrank.rank(tmp_path / "local.store", tmp_path / "b", RankOptions())
    assert a.converged and np.array_equal(a.scores, b.scores)
    mirror = next((tmp_path / "cache").iterdir())
    assert sorted(p.name for p in (mirror / "shards").iterdir()) == sorted(
        p.name for p in (remote_dir / "shards").iterdir()
    )


def test_damaged_file_at_the_url_is_exit_4(
    tmp_path: Path, url_store: tuple[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    url, remote_dir = url_store
    shard = remote_dir / "shards" / "block-000001.sources.npy"
    data = bytearray(shard.read_bytes())
    data[-1] ^= 0x01  # same size, other bytes: only the checksum can tell
    shard.write_bytes(bytes(data))
    _forget_uploads()
    assert main(["rank", url, "--out", str(tmp_path / "run"), "-q"]) == 4
    err = capsys.readouterr().err
    assert "block-000001.sources.npy" in err and "checksum" in err and "hint:" in err


def test_upload_without_manifest_is_not_a_store(
    tmp_path: Path, url_store: tuple[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    url, remote_dir = url_store
    (remote_dir / "manifest.json").unlink()  # what an interrupted upload leaves: manifest goes last
    _forget_uploads()
    assert main(["rank", url, "--out", str(tmp_path / "run"), "-q"]) == 4
    assert "not a shardrank store" in capsys.readouterr().err
    assert main(["build", str(_edges(tmp_path)), "--out", url, "--overwrite", "-q"]) == 0
    assert main(["rank", url, "--out", str(tmp_path / "run2"), "-q"]) == 0


def test_missing_backend_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    if importlib.util.find_spec("s3fs") is not None:
        pytest.skip("s3fs is installed: s3:// would be reached for real")
    assert (
        main(["rank", "s3://bucket.example/crawl.store", "--out", str(tmp_path / "run"), "-q"]) == 2
    )
    assert "s3fs" in capsys.readouterr().err
