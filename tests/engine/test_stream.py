"""Streaming: backfill from any row, the daily one-day run, pair lists and tiles agree."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.engine import DayResult, one_day, stream, tile
from monitor.errors import EngineInputError, SpecError
from tests.engine_reference import desk_returns, finite_max_difference, reference_rolling

SPECS = [
    "rolling:30",
    "rolling:30,min=10",
    "rank:20,min=8",
    "ewma:hl=10",
    "ewma:lambda=0.94,mean=zero",
]


def cube(days: list[DayResult]) -> np.ndarray:
    return np.array([d.value for d in days])


def same(a: np.ndarray, b: np.ndarray, tolerance: float = 1e-12) -> bool:
    return (
        bool(np.array_equal(np.isnan(a), np.isnan(b))) and finite_max_difference(a, b) <= tolerance
    )


def wide_returns(rows: int = 180, columns: int = 24, seed: int = 4) -> np.ndarray:
    """Many instruments, a few with gaps: the fast path plus general-path overrides."""
    rng = np.random.default_rng(seed)
    returns = rng.standard_normal((rows, columns)) * 0.01 + 0.004 * rng.standard_normal((rows, 1))
    returns[0] = np.nan
    returns[60:64, 3] = np.nan
    returns[:50, 7] = np.nan
    returns[100, 9] = np.nan
    return returns


@pytest.mark.parametrize("spec", SPECS)
def test_stream_from_a_later_row_equals_the_full_pass(spec: str) -> None:
    returns = desk_returns()
    full = list(stream(returns, spec))
    for start in (1, 37, 131, 259):
        part = list(stream(returns, spec, start=start, stop=min(start + 40, 260)))
        assert [d.t for d in part] == list(range(start, min(start + 40, 260)))
        assert same(cube(part), cube(full[start : start + 40]))
        assert np.allclose(
            np.array([d.n for d in part]),
            np.array([d.n for d in full[start : start + 40]]),
            rtol=1e-12,
        )


@pytest.mark.parametrize("spec", SPECS)
def test_one_day_equals_the_same_day_of_a_full_pass(spec: str) -> None:
    returns = desk_returns()
    full = list(stream(returns, spec))
    for t in (0, 45, 160, -1):
        day = one_day(returns, spec, t)
        assert day.t == (t if t >= 0 else 259)
        assert same(day.value, full[day.t].value)
        assert np.array_equal(day.stale, full[day.t].stale)


@pytest.mark.parametrize("spec", SPECS)
def test_pair_list_output_equals_the_matrix_entries(spec: str) -> None:
    returns = desk_returns()
    pairs = np.array([[0, 1], [1, 0], [2, 4], [4, 4], [6, 3], [5, 0], [3, 2]])
    matrix = list(stream(returns, spec))
    listed = list(stream(returns, spec, pairs=pairs))
    for whole, part in zip(matrix, listed, strict=True):
        assert part.value.shape == (len(pairs),)
        assert same(part.value, whole.value[pairs[:, 0], pairs[:, 1]])
        assert np.allclose(part.n, whole.n[pairs[:, 0], pairs[:, 1]], rtol=1e-12)
        assert np.array_equal(part.stale, whole.stale[pairs[:, 0], pairs[:, 1]])


@pytest.mark.parametrize("spec", SPECS)
def test_tiles_put_together_equal_one_tile(spec: str) -> None:
    returns = wide_returns()
    single = cube(list(stream(returns, spec)))
    tiled = cube(list(stream(returns, spec, tile_size=7)))
    assert same(tiled, single)
    block = cube(list(tile(returns, spec, [2, 3, 7, 20], [0, 7, 9])))
    assert same(block, single[:, [2, 3, 7, 20]][:, :, [0, 7, 9]])


@pytest.mark.parametrize("spec", ["rolling:30", "rolling:20,min=12", "rank:20,min=15"])
def test_fast_path_with_general_overrides_matches_the_reference(spec: str) -> None:
    returns = wide_returns(rows=120, columns=12)
    window, min_count = (30, 30) if spec == "rolling:30" else (20, int(spec.split("=")[1]))
    value = cube(list(stream(returns, spec)))
    ref_value, _, _ = reference_rolling(returns, window, min_count, rank=spec.startswith("rank"))
    assert same(value, ref_value)


def test_chunk_size_does_not_change_results() -> None:
    returns = desk_returns()
    base = cube(list(stream(returns, "rolling:30,min=10")))
    for chunk in (1, 3, 64):
        assert same(cube(list(stream(returns, "rolling:30,min=10", chunk=chunk))), base, 1e-13)


def test_day_arrays_are_read_only_and_bands_come_with_them() -> None:
    day = one_day(desk_returns(), "rolling:30")
    with pytest.raises(ValueError):
        day.value[0, 0] = 0.5
    assert day.low.shape == day.value.shape == day.high.shape
    finite = np.isfinite(day.value) & (day.n > 3)
    assert np.all(day.low[finite] <= day.value[finite])
    assert np.all(day.value[finite] <= day.high[finite])


def test_bad_arguments_are_reported() -> None:
    returns = desk_returns(rows=40)
    with pytest.raises(SpecError, match="rolling:2"):
        next(stream(returns, "rolling:2"))
    with pytest.raises(EngineInputError, match="level"):
        next(stream(returns, "rolling:10", level=1.5))
    with pytest.raises(ValueError, match="start"):
        next(stream(returns, "rolling:10", start=30, stop=20))
    with pytest.raises(ValueError, match="pairs"):
        next(stream(returns, "rolling:10", pairs=[[0, 9]]))
    with pytest.raises(ValueError, match="outside"):
        one_day(returns, "rolling:10", 40)
    with pytest.raises(ValueError, match="inf"):
        one_day(np.full((5, 2), np.inf), "rolling:3")


@pytest.mark.parametrize(("spec", "centred"), [("ewma:hl=8", True), ("ewma:hl=8,mean=zero", False)])
def test_ewma_uniform_block_with_general_overrides_matches_the_reference(
    spec: str, centred: bool
) -> None:
    from tests.engine_reference import reference_ewma

    returns = wide_returns(rows=110, columns=12)
    value = cube(list(stream(returns, spec)))
    ref_value, _, _ = reference_ewma(returns, 0.5 ** (1 / 8), 8, centred=centred)
    assert same(value, ref_value)
    late = cube(list(stream(returns, spec, start=70)))
    assert same(late, value[70:])


@pytest.mark.parametrize("spec", SPECS)
def test_degenerate_inputs_give_shaped_results(spec: str) -> None:
    rng = np.random.default_rng(12)
    returns = rng.standard_normal((40, 4)) * 0.01
    returns[:, 3] = np.nan  # an instrument with no return at all
    assert list(stream(returns, spec, start=5, stop=5)) == []
    day = one_day(returns, spec)
    assert np.isnan(day.value[3]).all() and np.isnan(day.value[:, 3]).all()
    assert not day.stale[3].any() and (day.n[3] == 0).all()
    assert one_day(returns[:, :1], spec).value.shape == (1, 1)
    empty = next(stream(returns, spec, pairs=np.zeros((0, 2), dtype=int)))
    assert empty.value.shape == empty.n.shape == empty.stale.shape == (0,)
    first = one_day(returns, spec, 0)
    assert np.isnan(first.value).all()
