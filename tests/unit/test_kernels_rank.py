"""The numba kernels against slow, obviously correct Python versions of their docstrings."""

from __future__ import annotations

import numba
import numpy as np
import pytest

from shardrank.kernels import gather_block, n_chunks, scale_range


def naive_scale(
    r: np.ndarray, w_out: np.ndarray, slot: np.ndarray, lo: int, hi: int, chunk: int
) -> tuple[np.ndarray, list[float]]:
    s = np.full(r.size, -1.0)
    dead = []
    for a in range(lo, hi, chunk):
        acc = 0.0
        for i in range(a, min(a + chunk, hi)):
            k = int(slot[i]) if slot.size else i
            s[k] = r[i] / w_out[i] if w_out[i] > 0 else 0.0
            acc += r[i] if w_out[i] == 0 else 0.0
        dead.append(acc)
    return s, dead


def _csr(
    rng: np.random.Generator, n: int, first: int, n_rows: int, id_dtype: str
) -> tuple[np.ndarray, np.ndarray]:
    deg = rng.integers(0, 6, n_rows)
    offsets = np.concatenate([[0], np.cumsum(deg)]).astype(np.int64)
    sources = np.sort(rng.integers(0, n, int(offsets[-1])))  # any order; sorted like the store
    for j in range(n_rows):  # sources sorted within each row, as the build writes them
        sources[offsets[j] : offsets[j + 1]] = np.sort(rng.integers(0, n, deg[j]))
    return offsets, sources.astype(id_dtype)


def naive_gather(offsets, sources, weights, s, first, d, add_u, add_t, v, chunk, r):  # type: ignore[no-untyped-def]
    r = r.copy()
    n_rows = offsets.size - 1
    res = []
    for a in range(0, n_rows, chunk):
        acc_res = 0.0
        for j in range(a, min(a + chunk, n_rows)):
            g = first + j
            acc = 0.0
            for e in range(offsets[j], offsets[j + 1]):
                acc += (weights[e] if weights.size else 1.0) * s[int(sources[e])]
            y = d * acc + add_u + (add_t * v[j] if v.size else 0.0)
            acc_res += abs(y - r[g])
            r[g] = y
        res.append(acc_res)
    return r, res


def test_n_chunks() -> None:
    assert [n_chunks(n, 4) for n in (0, 1, 4, 5, 8, 9)] == [0, 1, 1, 2, 2, 3]


@pytest.mark.parametrize("chunk", [1, 3, 64])
@pytest.mark.parametrize("slots", [None, "<u2", "<u4", "<u8"])
def test_scale_range_matches_its_definition(chunk: int, slots: str | None) -> None:
    rng = np.random.default_rng(chunk)
    n = 50
    r = rng.uniform(0, 1, n)
    w_out = rng.uniform(0.5, 3, n) * (rng.uniform(0, 1, n) < 0.7)  # ~30% dead ends
    slot = np.empty(0, dtype="<u4") if slots is None else rng.permutation(n).astype(slots)
    lo, hi = 7, 45
    s = np.full(n, -1.0)
    dead = np.zeros(n_chunks(hi - lo, chunk))
    scale_range(r, w_out, slot, lo, hi, chunk, s, dead)
    want_s, want_dead = naive_scale(r, w_out, slot, lo, hi, chunk)
    assert np.array_equal(s, want_s)  # slots of ids outside lo:hi untouched (-1)
    assert np.array_equal(dead, want_dead)


@pytest.mark.parametrize("id_dtype", ["<u2", "<u4", "<u8"])
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("teleport", [False, True])
@pytest.mark.parametrize("chunk", [1, 4, 4096])
def test_gather_matches_its_definition(id_dtype: str, weighted: bool, teleport: bool, chunk: int) -> None:
    rng = np.random.default_rng(hash((id_dtype, weighted, teleport, chunk)) % 2**32)
    n, first, n_rows = 60, 20, 25
    offsets, sources = _csr(rng, n, first, n_rows, id_dtype)
    weights = rng.uniform(0.1, 2.0, sources.size) if weighted else np.empty(0)
    v = rng.uniform(0, 1, n_rows) if teleport else np.empty(0)
    r = rng.uniform(0, 1, n)
    s = r / rng.uniform(0.5, 3.0, n)
    args = (offsets, sources, weights, s, first, 0.85, 0.01, 0.15 if teleport else 0.0, v, chunk)
    got = r.copy()
    res = np.zeros(n_chunks(n_rows, chunk))
    gather_block(*args, got, res)
    want, want_res = naive_gather(*args, r)
    np.testing.assert_allclose(got, want, rtol=1e-15, atol=0)
    np.testing.assert_allclose(res, want_res, rtol=1e-14, atol=0)
    assert np.array_equal(got[:first], r[:first]) and np.array_equal(
        got[first + n_rows :], r[first + n_rows :]
    )


def test_kernels_are_bitwise_identical_for_any_thread_count() -> None:
    rng = np.random.default_rng(3)
    n, n_rows, chunk = 40_000, 40_000, 4096
    offsets, sources = _csr(rng, n, 0, n_rows, "<u4")
    weights = rng.uniform(0.1, 2.0, sources.size)
    w_out = rng.uniform(0.5, 3.0, n) * (rng.uniform(0, 1, n) < 0.8)
    r = rng.uniform(0, 1, n)
    rng_slot = rng.permutation(n).astype("<u4")
    before = numba.get_num_threads()
    outs = []
    try:
        for threads in (1, min(2, numba.config.NUMBA_NUM_THREADS)):
            numba.set_num_threads(threads)
            s = np.empty(n)
            dead = np.zeros(n_chunks(n, chunk))
            scale_range(r, w_out, rng_slot, 0, n, chunk, s, dead)
            a = r.copy()
            res_a = np.zeros(n_chunks(n_rows, chunk))
            gather_block(
                offsets, sources, weights, s, 0, 0.85, 1e-6, 0.0, np.empty(0), chunk, a, res_a
            )
            outs.append([x.tobytes() for x in (s, dead, a, res_a)])
    finally:
        numba.set_num_threads(before)
    assert outs[0] == outs[1]
