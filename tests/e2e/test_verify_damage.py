"""`shardrank verify` catches damage in every kind of store file, and `rank` refuses damaged stores.

Damage is real: bytes flipped, files truncated or removed on disk, then the CLI is run in
process (exit code and stderr checked). Expected behaviour comes from the issue's contract:
exit 4 naming the damaged file; 0 when sound.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import shardrank
from shardrank import BuildOptions
from shardrank.cli.main import main
from shardrank.errors import DamagedDataError

# one file of every kind a weighted store holds (block 1 of 3, so not only the first shard)
KINDS = [
    "manifest.json",
    "nodes.parquet",
    "out_degree.npy",
    "in_degree.npy",
    "out_weight.npy",
    "read_slot.npy",
    "shards/block-000001.offsets.npy",
    "shards/block-000001.sources.npy",
    "shards/block-000001.weights.npy",
]


@pytest.fixture(scope="module")
def pristine(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("pristine")
    rng = np.random.default_rng(8)
    src = [f"https://h{i % 5}.example/{i}" for i in rng.integers(0, 40, 300)]
    dst = [f"https://h{i % 5}.example/{i}" for i in rng.integers(0, 40, 300)]
    pq.write_table(
        pa.table({"src": src, "dst": dst, "w": rng.uniform(0.5, 2.0, 300)}), d / "e.parquet"
    )
    store = d / "store"
    shardrank.build_store([d / "e.parquet"], store, BuildOptions(weight="w", block_nodes=16))
    return store


@pytest.fixture
def store(pristine: Path, tmp_path: Path) -> Path:
    s = tmp_path / "store"
    shutil.copytree(pristine, s)
    return s


def _flip(path: Path, where: float) -> None:
    b = bytearray(path.read_bytes())
    i = min(len(b) - 1, int(len(b) * where))
    b[i] ^= 0xFF
    path.write_bytes(bytes(b))


def _truncate(path: Path, where: float) -> None:
    b = path.read_bytes()
    path.write_bytes(b[: int(len(b) * where)])


def _verify_fails(store: Path, name: str, capsys: pytest.CaptureFixture[str]) -> str:
    capsys.readouterr()
    assert main(["verify", str(store), "-q"]) == 4
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "Traceback" not in err
    assert Path(name).name in err, err
    assert "hint:" in err
    return err


def test_pristine_store_verifies(store: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["verify", str(store)]) == 0
    assert "sound" in capsys.readouterr().out
    assert len(list((store / "shards").glob("*.weights.npy"))) == 3


@pytest.mark.parametrize("where", [0.0, 0.5, 0.999])
@pytest.mark.parametrize("name", KINDS)
def test_flipped_byte(
    store: Path, name: str, where: float, capsys: pytest.CaptureFixture[str]
) -> None:
    _flip(store / name, where)
    _verify_fails(store, name, capsys)


@pytest.mark.parametrize("where", [0.0, 0.5, 0.999])
@pytest.mark.parametrize("name", KINDS)
def test_truncated_file(
    store: Path, name: str, where: float, capsys: pytest.CaptureFixture[str]
) -> None:
    _truncate(store / name, where)
    _verify_fails(store, name, capsys)


@pytest.mark.parametrize("name", KINDS)
def test_missing_file(store: Path, name: str, capsys: pytest.CaptureFixture[str]) -> None:
    (store / name).unlink()
    _verify_fails(store, name, capsys)


@pytest.mark.parametrize("name", KINDS)
def test_file_grown_by_one_byte(store: Path, name: str, capsys: pytest.CaptureFixture[str]) -> None:
    with open(store / name, "ab") as f:
        f.write(b"\n" if name.endswith(".json") else b"\x00")
    _verify_fails(store, name, capsys)


def test_every_plausible_edit_of_the_manifest_is_caught(store: Path) -> None:
    # swap each digit for another digit and each letter for another letter: the JSON stays
    # valid, so only a checksum over the whole manifest (counts, options, input, times) can tell
    path = store / "manifest.json"
    raw = path.read_bytes()
    caught = 0
    for i, c in enumerate(raw):
        ch = chr(c)
        if ch.isdigit():
            new = str((int(ch) + 1) % 10)
        elif ch.isalpha() and ch.isascii():
            new = "a" if ch != "a" else "b"
        elif ch in " \n":
            new = "\t" if ch == " " else "\r"  # whitespace for whitespace: still valid JSON
        else:
            continue
        path.write_bytes(raw[:i] + new.encode() + raw[i + 1 :])
        with pytest.raises(DamagedDataError) as e:
            shardrank.open_store(store)
        assert "manifest.json" in e.value.message
        caught += 1
    assert caught > 500


def test_swapped_shards_are_caught(store: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a, b = store / "shards/block-000000.sources.npy", store / "shards/block-000002.sources.npy"
    da, db = a.read_bytes(), b.read_bytes()
    a.write_bytes(db)
    b.write_bytes(da)
    _verify_fails(store, "block-00000", capsys)


def test_consistent_rewrite_is_caught_by_invariants(
    store: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # an attacker or a buggy tool rewrites a shard and fixes its size and checksum in the
    # manifest (and the manifest's own checksums): the structural invariants still object
    from shardrank.store.atomic import sha256_file
    from shardrank.store.manifest import FileInfo, encode_manifest, read_manifest

    name = "shards/block-000001.sources.npy"
    m = read_manifest(store)
    arr = np.load(store / name, allow_pickle=False)
    off = np.load(store / "shards/block-000001.offsets.npy", allow_pickle=False)
    row = int(np.flatnonzero(np.diff(off) >= 2)[0])
    i = int(off[row])
    arr[[i, i + 1]] = arr[[i + 1, i]]  # same ids and degrees, but a row out of order
    np.save(store / name, arr, allow_pickle=False)
    m.files[name] = FileInfo(bytes=(store / name).stat().st_size, sha256=sha256_file(store / name))
    m.fingerprint = m.compute_fingerprint()
    (store / "manifest.json").write_bytes(encode_manifest(m))
    shardrank.open_store(store)  # the manifest itself is now consistent
    err = _verify_fails(store, name, capsys)
    assert "increasing" in err


@pytest.mark.parametrize(
    "name", ["nodes.parquet", "shards/block-000002.weights.npy", "manifest.json"]
)
def test_rank_refuses_a_damaged_store(
    store: Path, tmp_path: Path, name: str, capsys: pytest.CaptureFixture[str]
) -> None:
    _flip(store / name, 0.5)
    run = tmp_path / "run"
    assert main(["rank", str(store), "--out", str(run), "-q"]) == 4
    err = capsys.readouterr().err
    assert Path(name).name in err and "Traceback" not in err


def test_directory_without_manifest_is_not_a_store(
    store: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (store / "manifest.json").unlink()
    assert main(["inspect", str(store)]) == 4
    assert "not a shardrank store" in capsys.readouterr().err


def _rewrite_consistently(store: Path, name: str, arr: np.ndarray) -> None:
    """Replace a file and fix its size and checksum in the manifest (and the manifest's own)."""
    from shardrank.store.atomic import sha256_file
    from shardrank.store.manifest import FileInfo, encode_manifest, read_manifest

    m = read_manifest(store)
    np.save(store / name, arr, allow_pickle=False)
    m.files[name] = FileInfo(bytes=(store / name).stat().st_size, sha256=sha256_file(store / name))
    m.fingerprint = m.compute_fingerprint()
    (store / "manifest.json").write_bytes(encode_manifest(m))
    shardrank.open_store(store)  # the manifest itself is consistent


def test_read_slots_that_are_no_permutation_are_caught(
    store: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    slot = np.load(store / "read_slot.npy", allow_pickle=False)
    slot[1] = slot[0]  # two nodes in one slot
    _rewrite_consistently(store, "read_slot.npy", slot)
    assert "permutation" in _verify_fails(store, "read_slot.npy", capsys)


def test_swapped_read_slots_are_caught_by_the_degrees(
    store: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # still a permutation, but two nodes with different out-degrees trade their slots: the
    # shards now credit each one's out-links to the other
    slot = np.load(store / "read_slot.npy", allow_pickle=False)
    deg = np.load(store / "out_degree.npy", allow_pickle=False)
    a, b = int(np.argmax(deg)), int(np.argmin(deg))
    slot[[a, b]] = slot[[b, a]]
    _rewrite_consistently(store, "read_slot.npy", slot)
    _verify_fails(store, "out_degree.npy", capsys)
