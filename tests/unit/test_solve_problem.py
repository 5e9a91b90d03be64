"""Options, teleport and dead-end constants, checkpoints: the small parts of solve/."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from shardrank import settings
from shardrank.errors import BadInputError
from shardrank.solve.checkpoint import IterState, load_checkpoint, write_checkpoint
from shardrank.solve.options import RankOptions
from shardrank.solve.problem import Problem, Teleport

# ---- options -----------------------------------------------------------------------------------


@pytest.mark.parametrize("d", [0.0, 1.0, 1.5, -0.1, math.nan, math.inf])
def test_damping_outside_the_open_interval_is_refused(d: float) -> None:
    with pytest.raises(BadInputError, match="0 < d < 1"):
        RankOptions(damping=d).validate()


@pytest.mark.parametrize("d", [1e-9, 0.5, 0.85, 0.99, 0.999999])
def test_damping_inside_is_accepted(d: float) -> None:
    RankOptions(damping=d).validate()


@pytest.mark.parametrize("tol", [0.0, -1e-9, math.nan])
def test_tol_must_be_positive(tol: float) -> None:
    with pytest.raises(BadInputError, match="--tol"):
        RankOptions(tol=tol).validate()


def test_a_tol_below_float64_precision_is_allowed() -> None:
    RankOptions(tol=1e-300).validate()  # the run goes to max-iter, it is not an input error


@pytest.mark.parametrize(
    "kw",
    [
        {"max_iter": 0},
        {"method": "jacobi"},
        {"dead_ends": "drop"},
        {"threads": 0},
        {"checkpoint_every": 0},
        {"checkpoint_seconds": 0.0},
    ],
)
def test_other_options_are_checked(kw: dict[str, object]) -> None:
    with pytest.raises(BadInputError):
        RankOptions(**kw).validate()  # type: ignore[arg-type]


def test_answer_options_are_those_that_change_the_bits() -> None:
    a = RankOptions(threads=1, checkpoint_every=3).answer_options()
    b = RankOptions(threads=2, checkpoint_seconds=5.0).answer_options()
    assert a == b and set(a) == {"damping", "tol", "max_iter", "method", "dead_ends"}


# ---- teleport and dead-end constants ------------------------------------------------------------


def test_teleport_dense_and_blocks() -> None:
    t = Teleport(10, np.array([1, 4, 5, 9]), np.array([0.1, 0.2, 0.3, 0.4]))
    dense = t.dense()
    assert dense.sum() == pytest.approx(1.0) and not t.uniform
    buf = np.full(8, -1.0)
    for first, n_rows in ((0, 3), (3, 3), (6, 4), (4, 2)):
        assert np.array_equal(t.fill_block(first, n_rows, buf), dense[first : first + n_rows])
    assert np.array_equal(Teleport(4).dense(), np.full(4, 0.25)) and Teleport(4).uniform


@pytest.mark.parametrize("uniform", [True, False])
@pytest.mark.parametrize("dead_ends", ["teleport", "uniform"])
def test_constants_put_back_the_mass_that_links_do_not_carry(uniform: bool, dead_ends: str) -> None:
    # common practice: a step moves d (1 - D) along links, and must add d D + (1 - d) elsewhere
    n, d, dead = 10, 0.85, 0.3
    t = Teleport(n) if uniform else Teleport(n, np.array([2, 7]), np.array([0.25, 0.75]))
    add_u, add_t = Problem(d, t, dead_ends).constants(dead)
    v = t.dense()
    added = n * add_u + add_t * (1.0 if not uniform else 0.0)
    assert added == pytest.approx(d * dead + (1 - d), abs=1e-15)
    # where it goes: dead mass along v (strongly preferential) or 1/n (weakly preferential)
    per_node = add_u + add_t * (0.0 if uniform else v)
    u = v if dead_ends == "teleport" else np.full(n, 1.0 / n)
    np.testing.assert_allclose(per_node, d * dead * u + (1 - d) * v, rtol=0, atol=1e-16)


# ---- checkpoints --------------------------------------------------------------------------------


def _state(k: int) -> IterState:
    return IterState(
        iteration=k,
        residuals=[0.1] * k,
        bounds=[1.25e-10 * j for j in range(k)],
        steps=["power"] * k,
    )


def test_checkpoints_round_trip_exactly_and_keep_the_newest(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    vecs = {k: rng.uniform(0, 1, 17) for k in range(1, 5)}
    for k, r in vecs.items():
        write_checkpoint(tmp_path, r, _state(k), {"tag": k})
    names = sorted(p.name for p in (tmp_path / "checkpoints").iterdir())
    assert names == [f"iter-{k:06d}" for k in range(5 - settings.CHECKPOINTS_KEPT, 5)]
    loaded = load_checkpoint(tmp_path, 17)
    assert loaded is not None
    r, st, meta, problems = loaded
    assert (
        r.tobytes() == vecs[4].tobytes()
        and st == _state(4)
        and meta == {"tag": 4}
        and problems == []
    )


def test_a_damaged_newest_checkpoint_falls_back(tmp_path: Path) -> None:
    vecs = {k: np.full(5, float(k)) for k in (1, 2)}
    for k, r in vecs.items():
        write_checkpoint(tmp_path, r, _state(k), {})
    f = tmp_path / "checkpoints" / "iter-000002" / "scores.npy"
    f.write_bytes(f.read_bytes()[:-1] + b"\x00")
    loaded = load_checkpoint(tmp_path, 5)
    assert loaded is not None and loaded[1].iteration == 1 and "iter-000002" in loaded[3][0]


def test_a_checkpoint_of_another_size_is_skipped(tmp_path: Path) -> None:
    write_checkpoint(tmp_path, np.full(5, 0.2), _state(1), {})
    assert load_checkpoint(tmp_path, 6) is None
    assert load_checkpoint(tmp_path / "nothing", 5) is None


def test_a_torn_checkpoint_directory_is_ignored_and_cleaned(tmp_path: Path) -> None:
    write_checkpoint(tmp_path, np.full(5, 0.2), _state(1), {})
    torn = tmp_path / "checkpoints" / ".iter-000002.partial-999999"
    torn.mkdir()
    (torn / "scores.npy").write_bytes(b"\x93NUMPY")
    loaded = load_checkpoint(tmp_path, 5)
    assert loaded is not None and loaded[1].iteration == 1
    write_checkpoint(tmp_path, np.full(5, 0.2), _state(2), {})
    assert not torn.exists()
    state = json.loads((tmp_path / "checkpoints" / "iter-000002" / "state.json").read_text())
    assert state["state"]["bounds"][1] == 1.25e-10  # floats survive JSON exactly


# ---- engine threads -----------------------------------------------------------------------------


def test_threads_none_means_all_of_numbas_threads(build, tmp_path: Path) -> None:
    """An API run without ``threads`` uses every core even after a run in the same process
    asked for one (before the fix it silently kept the earlier run's count)."""
    import numba

    import shardrank

    store = build([1, 2, 3], [2, 3, 1])
    before = numba.get_num_threads()
    try:
        one = shardrank.rank(store, tmp_path / "a", RankOptions(threads=1))
        default = shardrank.rank(store, tmp_path / "b", RankOptions())
    finally:
        numba.set_num_threads(before)
    assert one.summary["threads"] == 1
    assert default.summary["threads"] == numba.config.NUMBA_NUM_THREADS
