"""patch_store(build(E_old), add, remove) equals build(E_new), file for file.

The reference E_new = (E_old - REMOVE) | ADD is computed here with Python sets, independently
of the code under test, and built in full with `shardrank build`; the two stores must hold
byte-identical .npy files (degrees, read slots, offsets, sources) and equal keys, both must
pass `verify`, and their in-edge CSR must equal a scipy.sparse reference (conftest's
reference_csr, the sum-duplicates semantics of scipy's coo -> csr conversion).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

import shardrank
from shardrank import BuildOptions
from shardrank.ingest import patch as patch_mod
from shardrank.ingest.patch import patch_store
from tests.conftest import read_store_csr, reference_csr, write_edges


def npy_files(store: Path) -> dict[str, bytes]:
    return {str(p.relative_to(store)): p.read_bytes() for p in sorted(store.rglob("*.npy"))}


def assert_same_store(patched: Path, full: Path) -> None:
    a, b = npy_files(patched), npy_files(full)
    assert sorted(a) == sorted(b)
    for name in a:
        assert a[name] == b[name], f"{name} differs"
    ka, pa_, ia, _ = read_store_csr(patched)
    kb, pb, ib, _ = read_store_csr(full)
    assert ka == kb
    np.testing.assert_array_equal(pa_, pb)
    np.testing.assert_array_equal(ia, ib)
    for s in (patched, full):
        shardrank.verify_store(shardrank.open_store(s))


def _keys(kind: str, rng: np.random.Generator, n: int) -> list[Any]:
    if kind == "int":
        # sparse, signed, unordered keys: ids must follow numeric order, not insertion order
        return sorted({int(x) for x in rng.choice(np.arange(-500, 5000), size=n, replace=False)})
    # string keys of varied lengths and a shared prefix: ids follow byte order
    return sorted(
        {
            f"h{int(x) % 7}.example/{'p' * int(x % 3)}{int(x)}"
            for x in rng.choice(10_000, n, replace=False)
        }
    )


def _case(
    rng: np.random.Generator, kind: str
) -> tuple[list[tuple[Any, Any]], list[tuple[Any, Any]], list[tuple[Any, Any]]]:
    """(old rows, add rows, remove rows) with every situation a delta can bring."""
    pool = _keys(kind, rng, 80)
    old_keys, fresh = pool[:40], pool[40:]
    n_old = int(rng.integers(20, 160))
    old = [
        (old_keys[int(rng.integers(0, 40))], old_keys[int(rng.integers(0, 40))])
        for _ in range(n_old)
    ]
    old += old[: n_old // 5]  # duplicates
    old.append((old_keys[3], old_keys[3]))  # a self-loop
    old_set = sorted(set(old))
    remove: list[tuple[Any, Any]] = []
    add: list[tuple[Any, Any]] = []
    # remove some present edges (and their duplicates)
    for i in rng.choice(
        len(old_set), size=min(len(old_set), int(rng.integers(0, 25))), replace=False
    ):
        remove.append(old_set[int(i)])
    # remove every edge of some nodes, so they vanish
    for v in rng.choice(old_keys, size=int(rng.integers(0, 4)), replace=False):
        remove += [e for e in old_set if v in e]
    # removals the store does not hold: unknown keys, known keys not linked
    remove += [(fresh[0], old_keys[0]), (old_keys[1], fresh[1])]
    remove += [
        (old_keys[int(rng.integers(0, 40))], old_keys[int(rng.integers(0, 40))]) for _ in range(5)
    ]
    # additions: between old keys (some already present), to new keys (below, among and above
    # the old ones), self-loops, duplicates, and some that are also removed
    add += [
        (old_keys[int(rng.integers(0, 40))], old_keys[int(rng.integers(0, 40))])
        for _ in range(int(rng.integers(0, 30)))
    ]
    add += [old_set[int(i)] for i in rng.integers(0, len(old_set), 5)]
    add += [
        (fresh[int(rng.integers(2, 40))], old_keys[int(rng.integers(0, 40))])
        for _ in range(int(rng.integers(0, 8)))
    ]
    add += [
        (old_keys[int(rng.integers(0, 40))], fresh[int(rng.integers(2, 40))])
        for _ in range(int(rng.integers(0, 8)))
    ]
    add += [(pool[0], pool[0]) if pool[0] in fresh else (fresh[5], fresh[5]), (fresh[6], fresh[7])]
    add += remove[: len(remove) // 4]
    add += add[:3]
    return old, [tuple(e) for e in add], [tuple(e) for e in remove]


def _write(path: Path, rows: list[tuple[Any, Any]], kind: str) -> Path:
    src = [r[0] for r in rows]
    dst = [r[1] for r in rows]
    if not rows:  # an empty table still needs typed columns
        import pyarrow as pa
        import pyarrow.parquet as pq

        t = pa.type_for_alias("int64" if kind == "int" else "string")
        path.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(pa.table({"src": pa.array([], t), "dst": pa.array([], t)}), path)
        return path
    return write_edges(path, src, dst)


def _new_set(old, add, remove, self_loops: str) -> set[tuple[Any, Any]]:
    def rule(rows):
        return {e for e in rows if self_loops == "keep" or e[0] != e[1]}

    return (rule(old) - set(remove)) | rule(add)


@pytest.mark.parametrize("seed", range(10))
def test_patch_equals_full_build(
    tmp_path: Path, seed: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    rng = np.random.default_rng(seed)
    kind = "int" if seed % 2 == 0 else "str"
    opts = dict(
        self_loops="drop" if seed % 4 in (1, 2) else "keep",
        block_nodes=int(rng.choice([3, 7, 64])),
        id_width=16 if seed % 3 == 0 else "auto",
    )
    # small chunks: the chunk walk crosses block and chunk boundaries many times
    monkeypatch.setattr(patch_mod, "CHUNK_EDGES", int(rng.choice([1, 5, 40, 1 << 21])))
    old, add, remove = _case(rng, kind)
    e_new = sorted(_new_set(old, add, remove, opts["self_loops"]))  # the reference edge set
    old_store = tmp_path / "old.store"
    shardrank.build_store(
        [_write(tmp_path / "old" / "e.parquet", old, kind)], old_store, BuildOptions(**opts)
    )
    add_f = _write(tmp_path / "d" / "add.parquet", add, kind)
    rem_f = _write(
        tmp_path / "d" / "remove.csv" if seed % 5 == 0 else tmp_path / "d" / "remove.parquet",
        remove,
        kind,
    )
    patched = tmp_path / "patched.store"
    m = patch_store(old_store, patched, add=[add_f], remove=[rem_f])
    full = tmp_path / "full.store"
    shardrank.build_store(
        [_write(tmp_path / "new" / "e.parquet", e_new, kind)], full, BuildOptions(**opts)
    )
    assert_same_store(patched, full)
    keys, ref = reference_csr([e[0] for e in e_new], [e[1] for e in e_new])
    got_keys, ptr, idx, _ = read_store_csr(patched)
    assert got_keys == keys
    np.testing.assert_array_equal(ptr, ref.indptr)
    np.testing.assert_array_equal(idx, ref.indices)

    # the counts say what happened, from the sets
    def rule(e: tuple[Any, Any]) -> bool:
        return opts["self_loops"] == "keep" or e[0] != e[1]

    old_set = {e for e in old if rule(e)}
    assert m.counts["edges_added"] == len(set(e_new) - old_set)
    assert m.counts["edges_removed"] == len(old_set - set(e_new))
    assert m.counts["removals_absent"] == len(set(remove) - old_set)
    old_nodes = set(shardrank.open_store(old_store).keys().to_pylist())
    new_nodes = {k for e in e_new for k in e}
    assert m.counts["nodes_added"] == len(new_nodes - old_nodes)
    assert m.counts["nodes_vanished"] == len(old_nodes - new_nodes)
    assert m.options["build_path"] == "patch"
    assert m.input["patched_from"] == shardrank.open_store(old_store).fingerprint


def test_patch_of_a_patch_and_pagerank(tmp_path: Path) -> None:
    """Two patches in a row still equal a full build, and PageRank over the patched store is
    bitwise the one over the full build (the stores are identical)."""
    rng = np.random.default_rng(42)
    old, add, remove = _case(rng, "int")
    _, add2, remove2 = _case(np.random.default_rng(43), "int")
    s0 = tmp_path / "s0"
    shardrank.build_store(
        [_write(tmp_path / "o.parquet", old, "int")], s0, BuildOptions(block_nodes=8)
    )
    s1, s2 = tmp_path / "s1", tmp_path / "s2"
    patch_store(
        s0,
        s1,
        add=[_write(tmp_path / "a1.parquet", add, "int")],
        remove=[_write(tmp_path / "r1.parquet", remove, "int")],
    )
    patch_store(
        s1,
        s2,
        add=[_write(tmp_path / "a2.parquet", add2, "int")],
        remove=[_write(tmp_path / "r2.parquet", remove2, "int")],
    )
    e1 = _new_set(old, add, remove, "keep")
    e2 = sorted(_new_set(e1, add2, remove2, "keep"))
    full = tmp_path / "full"
    shardrank.build_store(
        [_write(tmp_path / "n.parquet", e2, "int")], full, BuildOptions(block_nodes=8)
    )
    assert_same_store(s2, full)
    a = shardrank.rank(s2, tmp_path / "ra", shardrank.RankOptions(tol=1e-12))
    b = shardrank.rank(full, tmp_path / "rb", shardrank.RankOptions(tol=1e-12))
    assert a.converged and b.converged
    assert np.array_equal(np.asarray(a.scores), np.asarray(b.scores))
    assert a.keys.to_pylist() == b.keys.to_pylist()


def test_empty_delta_copies_the_graph(tmp_path: Path) -> None:
    s0 = tmp_path / "s0"
    shardrank.build_store([write_edges(tmp_path / "o.parquet", [1, 2, 3], [2, 3, 1])], s0)
    s1 = tmp_path / "s1"
    m = patch_store(s0, s1)
    assert_same_store(s1, s0)
    assert m.counts["edges_added"] == m.counts["edges_removed"] == 0


# -- kernels/patch.py against plain numpy statements of the same job -----------------------------
def _merge_rows_numpy(off, sources, e_base, rows_new, slot_to_new, rem_at, add_d, add_s):
    """merge_rows over whole arrays in numpy: the old edges minus the removed ones, then every
    added edge up to the last kept row, stably by destination (old edges first in a row)."""
    d = np.repeat(rows_new, np.diff(off))
    s = slot_to_new[sources[off[0] : off[-1]]]
    keep = ~np.isin(np.arange(off[0], off[-1]) + e_base, rem_at)
    d, s = d[keep], s[keep]
    take = add_d <= (rows_new.max() if rows_new.shape[0] else -1)
    dd, ss = np.concatenate([d, add_d[take]]), np.concatenate([s, add_s[take]])
    order = np.argsort(dd, kind="stable")
    return dd[order], ss[order], int(np.count_nonzero(take))


@pytest.mark.parametrize("seed", range(6))
def test_merge_rows_kernel_matches_numpy(seed: int) -> None:
    from shardrank.kernels.patch import merge_rows

    rng = np.random.default_rng(seed)
    n_rows, n_nodes, e_base = 40, 60, 1000
    deg = rng.integers(0, 6, n_rows)
    off = np.concatenate([[0], np.cumsum(deg)]).astype(np.int64) + 3  # rows start mid-block
    sources = rng.integers(0, n_nodes, int(off[-1])).astype(np.uint32)
    slot_to_new = rng.permutation(n_nodes).astype(np.int64)
    # monotone row map with vanished rows (-1); a vanished row loses every edge
    gone = rng.random(n_rows) < 0.2
    rows_new = np.where(gone, -1, np.cumsum(~gone) - 1 + np.cumsum(rng.random(n_rows) < 0.3))
    rem = [
        e
        for i in range(n_rows)
        for e in range(off[i], off[i + 1])
        if gone[i] or rng.random() < 0.25
    ]
    rem_at = np.array(rem, dtype=np.int64) + e_base
    add_d = np.sort(rng.integers(0, int(rows_new.max()) + 1, 30)).astype(np.int64)
    add_s = rng.integers(0, n_nodes, 30).astype(np.int64)
    want_d, want_s, n_take = _merge_rows_numpy(
        off, sources, e_base, rows_new, slot_to_new, rem_at, add_d, add_s
    )
    out_d = np.full(int(off[-1]) + 30, -7, dtype=np.int64)
    out_s = np.full_like(out_d, -7)
    o, r, k = merge_rows(
        off, sources, e_base, rows_new, slot_to_new, rem_at, 0, add_d, add_s, 0, out_d, out_s, 0
    )
    assert (o, r, k) == (want_d.shape[0], rem_at.shape[0], n_take)
    np.testing.assert_array_equal(out_d[:o], want_d)
    np.testing.assert_array_equal(out_s[:o], want_s)


@pytest.mark.parametrize("seed", range(6))
def test_renumber_and_new_degrees_kernels_match_numpy(seed: int) -> None:
    from shardrank.kernels.patch import new_degrees, renumber

    rng = np.random.default_rng(seed)
    n = 50
    in_old = rng.integers(0, 3, n).astype(np.int64)
    out_old = rng.integers(0, 3, n).astype(np.int64)
    # removed edges (old ids); at most a node's degree, as in a real store
    rd = np.repeat(np.arange(n), rng.binomial(in_old, 0.5))
    rs = np.repeat(np.arange(n), rng.binomial(out_old, 0.5))
    m = min(rd.shape[0], rs.shape[0])
    rd, rs = rng.permutation(rd)[:m], rng.permutation(rs)[:m]
    touched = rng.integers(0, n, 4).astype(np.int64)
    ins = np.sort(rng.integers(0, n + 1, 6)).astype(np.int64)
    # the numpy statement (the one patch.py used before the kernel)
    in_deg = in_old - np.bincount(rd, minlength=n)
    out_deg = out_old - np.bincount(rs, minlength=n)
    tch = np.zeros(n, dtype=bool)
    tch[touched] = True
    kept = (in_deg + out_deg > 0) | tch
    kept_prefix = np.concatenate([[0], np.cumsum(kept)])
    nb = np.cumsum(np.bincount(ins, minlength=n + 1))[:n]
    want_pos = kept_prefix[:n] + nb
    old_to_new, pos_new = np.empty(n, dtype=np.int64), np.empty(n, dtype=np.int64)
    at_ins = np.empty(ins.shape[0], dtype=np.int64)
    n_kept = renumber(in_old, out_old, rd, rs, touched, ins, old_to_new, pos_new, at_ins)
    assert n_kept == int(kept.sum())
    np.testing.assert_array_equal(pos_new, want_pos)
    np.testing.assert_array_equal(old_to_new, np.where(kept, want_pos, -1))
    np.testing.assert_array_equal(at_ins, kept_prefix[ins])
    n_new = n_kept + ins.shape[0]
    nd = rng.integers(0, n_new, 7).astype(np.int64)
    ns = rng.integers(0, n_new, 7).astype(np.int64)
    want_in, want_out = np.zeros(n_new, dtype=np.int64), np.zeros(n_new, dtype=np.int64)
    want_in[old_to_new[kept]] = in_deg[kept]
    want_out[old_to_new[kept]] = out_deg[kept]
    want_in += np.bincount(nd, minlength=n_new)
    want_out += np.bincount(ns, minlength=n_new)
    new_in, new_out = np.zeros(n_new, dtype=np.int64), np.zeros(n_new, dtype=np.int64)
    new_degrees(in_old, out_old, old_to_new, rd, rs, nd, ns, new_in, new_out)
    np.testing.assert_array_equal(new_in, want_in)
    np.testing.assert_array_equal(new_out, want_out)


def test_slot_to_new_id_kernel_matches_numpy() -> None:
    from shardrank.kernels.patch import slot_to_new_id
    from shardrank.store.slots import ids_by_slot

    rng = np.random.default_rng(3)
    slot = rng.permutation(40).astype(np.uint32)
    old_to_new = np.where(rng.random(40) < 0.8, np.arange(40), -1).astype(np.int64)
    out = np.empty(40, dtype=np.int64)
    slot_to_new_id(slot, old_to_new, out)
    np.testing.assert_array_equal(out, old_to_new[ids_by_slot(slot)])


def test_find_in_rows_kernel_matches_numpy() -> None:
    from shardrank.kernels.patch import find_in_rows

    rng = np.random.default_rng(5)
    rows = [np.sort(rng.choice(30, rng.integers(0, 8), replace=False)) for _ in range(20)]
    off = np.concatenate([[0], np.cumsum([len(x) for x in rows])]).astype(np.int64)
    sources = np.concatenate(rows).astype(np.uint32)
    local = rng.integers(0, 20, 200).astype(np.int64)
    target = rng.integers(0, 30, 200).astype(np.int64)
    found, where = np.empty(200, dtype=bool), np.empty(200, dtype=np.int64)
    find_in_rows(off, sources, local, target, 100, found, where)
    # numpy: np.searchsorted within each row, and membership by value
    want_at = np.array(
        [off[r] + np.searchsorted(rows[r], t) for r, t in zip(local, target, strict=True)]
    )
    want_hit = np.array([t in rows[r] for r, t in zip(local, target, strict=True)])
    np.testing.assert_array_equal(found, want_hit)
    np.testing.assert_array_equal(where, want_at + 100)


def test_scatter_kept_kernel_matches_numpy() -> None:
    from shardrank.kernels.patch import scatter_kept

    rng = np.random.default_rng(9)
    kept = rng.random(30) < 0.7
    old_to_new = np.where(kept, np.cumsum(kept) - 1, -1).astype(np.int64)
    values = rng.integers(-(2**62), 2**62, 30)
    out = np.full(int(kept.sum()), 0, dtype=np.int64)
    scatter_kept(old_to_new, values, out)
    np.testing.assert_array_equal(out, values[kept])
