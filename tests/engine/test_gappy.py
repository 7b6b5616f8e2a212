"""Rolling Pearson on panels with gaps (monitor.engine.gappy): every pair of a tile from
running matrix sums, checked against pandas, scipy and the slow two-pass reference."""

from __future__ import annotations

from collections import deque

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor.engine import one_day, stream, tile
from monitor.engine.stream import RETURN_LIMIT
from tests.engine_reference import finite_max_difference, reference_ewma, reference_rolling


def market_panel(rows: int, columns: int, seed: int, markets: int = 3) -> np.ndarray:
    """Fictional instruments on a few markets: each market's own closed days (shared by all
    its instruments), staggered listings, 0.5 % random missing returns, fat tails."""
    rng = np.random.default_rng(seed)
    factor = rng.standard_t(4, size=rows)
    loadings = rng.uniform(-0.5, 0.9, size=columns)
    scale = rng.uniform(0.005, 0.03, size=columns)
    returns = scale * (loadings * factor[:, None] + rng.standard_t(5, size=(rows, columns)))
    market = np.arange(columns) % markets
    for m in range(markets):
        closed = rng.random(rows) < 0.04
        returns[np.ix_(closed, market == m)] = np.nan
    returns[rng.random((rows, columns)) < 0.005] = np.nan
    for column in rng.choice(columns, size=max(1, columns // 4), replace=False):
        returns[: rng.integers(1, rows // 3), column] = np.nan
    returns[0] = np.nan
    return returns


def cube(days: list) -> tuple[np.ndarray, np.ndarray, np.ndarray]:  # type: ignore[type-arg]
    return (
        np.array([d.value for d in days]),
        np.array([d.n for d in days]),
        np.array([d.stale for d in days]),
    )


@pytest.mark.parametrize(("window", "min_count"), [(63, 40), (20, 14), (7, 3)])
def test_gappy_panel_matches_pandas_rolling_corr_for_every_pair(
    window: int, min_count: int
) -> None:
    """pandas DataFrame.rolling(W, min_periods=M).corr(): pairwise-complete windows
    (general-purpose reference)."""
    returns = market_panel(700, 24, seed=5)
    value, n, stale = cube(list(stream(returns, f"rolling:{window},min={min_count}")))
    with np.errstate(divide="ignore", invalid="ignore"):
        expected = pd.DataFrame(returns).rolling(window, min_periods=min_count).corr()
    expected = expected.to_numpy().reshape(value.shape)
    assert np.isfinite(value).sum() > 0.5 * value.size
    assert finite_max_difference(value, expected) <= 1e-10
    # defined in exactly the same cells (no constant windows in this panel)
    assert not stale.any()
    assert np.array_equal(np.isfinite(value), np.isfinite(expected))
    # counts: common days of the window, from the mask directly
    present = (~np.isnan(returns)).astype(float)
    t = 400
    block = present[t - window + 1 : t + 1]
    assert np.array_equal(n[t], block.T @ block)


@pytest.mark.parametrize(("window", "min_count"), [(30, 30), (30, 12), (5, 3)])
def test_gappy_panel_matches_the_two_pass_reference_values_counts_and_stale(
    window: int, min_count: int
) -> None:
    returns = market_panel(220, 8, seed=11)
    returns[90:150, 2] = 0.0  # a stale close inside a gappy column
    value, n, stale = cube(list(stream(returns, f"rolling:{window},min={min_count}")))
    ref_value, ref_n, ref_stale = reference_rolling(returns, window, min_count)
    assert np.array_equal(np.isnan(value), np.isnan(ref_value))
    assert finite_max_difference(value, ref_value) <= 1e-12
    assert np.array_equal(n, ref_n)
    assert np.array_equal(stale, ref_stale)
    assert stale[140, 2].sum() > 0


def test_flat_on_the_common_days_only_is_stale() -> None:
    """Instrument 0 moves only on days instrument 1 is missing: over their common days 0 is
    constant, though its own window is not (a test on the window's own values per pair)."""
    rng = np.random.default_rng(4)
    rows = 80
    returns = rng.standard_normal((rows, 3)) * 0.01
    returns[:, 0] = 0.002
    moves = np.arange(5, rows, 9)
    returns[moves, 0] = rng.standard_normal(moves.size) * 0.02
    returns[moves, 1] = np.nan
    day = one_day(returns, "rolling:40,min=20")
    ref_value, ref_n, ref_stale = reference_rolling(returns, 40, 20)
    assert day.stale[0, 1] and day.stale[1, 0] and ref_stale[-1, 0, 1]
    assert np.isnan(day.value[0, 1])
    assert np.isfinite(day.value[0, 2]) and not day.stale[0, 2]
    assert abs(day.value[0, 2] - ref_value[-1, 0, 2]) <= 1e-12
    assert np.array_equal(day.n, ref_n[-1])


def test_scipy_pearsonr_on_each_windows_common_days() -> None:
    """scipy.stats.pearsonr per window on the pair's common days (general-purpose reference)."""
    returns = market_panel(300, 10, seed=8)
    window = 45
    value, _, _ = cube(list(stream(returns, f"rolling:{window},min=20")))
    checked = 0
    for t in range(window, returns.shape[0], 11):
        for i, j in [(0, 1), (2, 7), (3, 4), (5, 9), (1, 8)]:
            x = returns[t - window + 1 : t + 1, i]
            y = returns[t - window + 1 : t + 1, j]
            keep = ~(np.isnan(x) | np.isnan(y))
            if keep.sum() < 20:
                continue
            assert abs(value[t, i, j] - stats.pearsonr(x[keep], y[keep]).statistic) <= 1e-10
            checked += 1
    assert checked > 80


def test_a_tile_of_the_matrix_equals_the_same_block_of_the_full_stream() -> None:
    returns = market_panel(260, 12, seed=2)
    spec = "rolling:25,min=10"
    full, full_n, full_stale = cube(list(stream(returns, spec)))
    rows, cols = np.array([1, 4, 5, 9]), np.array([0, 2, 3, 4, 7, 8, 11])
    part, part_n, part_stale = cube(list(tile(returns, spec, rows, cols)))
    block = np.ix_(np.arange(returns.shape[0]), rows, cols)
    assert finite_max_difference(part, full[block]) <= 1e-13
    assert np.array_equal(np.isnan(part), np.isnan(full[block]))
    assert np.array_equal(part_n, full_n[block])
    assert np.array_equal(part_stale, full_stale[block])


def _last_window(returns: np.ndarray, window: int) -> np.ndarray:
    block = returns[-window:]
    columns = returns.shape[1]
    out = np.full((columns, columns), np.nan)
    for i in range(columns):
        for j in range(columns):
            keep = ~(np.isnan(block[:, i]) | np.isnan(block[:, j]))
            x, y = block[keep, i], block[keep, j]
            dx, dy = x - x.mean(), y - y.mean()
            out[i, j] = np.dot(dx, dy) / np.sqrt(np.dot(dx, dx) * np.dot(dy, dy))
    return out


@pytest.mark.slow
def test_twenty_thousand_gappy_days_end_on_the_two_pass_value() -> None:
    """Re-anchoring: after 20,000 days, an episode of moves a thousand times larger and a
    large common offset, the last window agrees with a two-pass computation."""
    returns = market_panel(20_000, 6, seed=9)
    returns[5000:5200] *= 1000.0
    returns[:, 3] += 5.0
    returns[-30:, 4] = np.nan  # missing for most of the last window
    last = deque(stream(returns, "rolling:63,min=20"), maxlen=1)[0]
    assert last.t == 19_999
    expected = _last_window(returns, 63)
    assert np.isnan(returns[-63:]).any()
    assert np.max(np.abs(last.value - expected)) <= 1e-12


def test_huge_returns_are_clipped_not_overflowed() -> None:
    """A return of 1e200 (a data error) used to overflow the sums of squares to inf and
    leave NaN for every pair of that instrument; it is now clipped to RETURN_LIMIT."""
    rng = np.random.default_rng(1)
    returns = rng.standard_normal((60, 3)) * 0.01
    returns[10, 1] = np.nan  # a gap: the pairwise sums path
    returns[30, 0] = 1e200
    day = one_day(returns, "rolling:50,min=40")
    clipped = returns.copy()
    clipped[30, 0] = RETURN_LIMIT
    expected = _last_window(clipped, 50)
    assert np.all(np.isfinite(day.value))
    assert np.max(np.abs(day.value - expected)) <= 1e-12


def test_every_day_after_a_burst_of_huge_moves_agrees_with_two_pass() -> None:
    """When moves a thousand times larger leave the window, the running sums keep their
    rounding unless re-anchored on that very day (not only at the next chunk): every day
    after the episode agrees with a two-pass computation on the common days."""
    returns = market_panel(4200, 5, seed=9)
    returns[3000:3200] *= 1000.0
    start = 2900
    days = list(stream(returns, "rolling:63,min=20", start=start))
    worst, checked = 0.0, 0
    for day in days[::2]:
        block = returns[day.t - 62 : day.t + 1]
        for i in range(5):
            for j in range(i + 1, 5):
                keep = ~(np.isnan(block[:, i]) | np.isnan(block[:, j]))
                if keep.sum() < 20:
                    continue
                x, y = block[keep, i], block[keep, j]
                dx, dy = x - x.mean(), y - y.mean()
                expected = np.dot(dx, dy) / np.sqrt(np.dot(dx, dx) * np.dot(dy, dy))
                worst = max(worst, abs(day.value[i, j] - expected))
                checked += 1
    assert checked > 5000
    assert worst <= 1e-13


@pytest.mark.parametrize("spec", ["ewma:hl=10,min=1", "ewma:hl=21,min=8"])
def test_gappy_ewma_matches_pandas_ewm_corr_for_every_pair(spec: str) -> None:
    """pandas DataFrame.ewm(halflife=H).corr() (adjust=True, ignore_na=False): weights on the
    pair's common days (general-purpose reference)."""
    returns = market_panel(600, 20, seed=21)
    half_life = float(spec.split("hl=")[1].split(",")[0])
    minimum = int(spec.split("min=")[1])
    value, n, stale = cube(list(stream(returns, spec)))
    with np.errstate(divide="ignore", invalid="ignore"):
        expected = pd.DataFrame(returns).ewm(halflife=half_life).corr()
    expected = expected.to_numpy().reshape(value.shape)
    assert np.isfinite(value).sum() > 0.5 * value.size
    assert finite_max_difference(value, expected) <= 1e-10
    # pandas has a value wherever the engine has one; the engine has none below its minimum
    # Kish count or on a pair's first common day (one return: no variance, stale)
    assert np.all(np.isfinite(expected[np.isfinite(value)]))
    assert np.all(np.isfinite(value) | ~np.isfinite(expected) | stale | (n < minimum))


def test_gappy_ewma_matches_the_weighted_two_pass_reference() -> None:
    returns = market_panel(160, 7, seed=3)
    returns[60:100, 1] = 0.0  # a stale close
    lam = 0.5 ** (1 / 8)
    value, n, stale = cube(list(stream(returns, "ewma:hl=8,min=3")))
    ref_value, ref_n, ref_stale = reference_ewma(returns, lam, 3)
    assert finite_max_difference(value, ref_value) <= 1e-11
    assert np.allclose(n, ref_n, rtol=1e-12, atol=0)
    assert np.array_equal(np.isnan(value), np.isnan(ref_value))


def test_gappy_ewma_rebases_its_growing_weights_over_a_long_history() -> None:
    """hl=2 grows the stored weights by 2 every 2 rows: several rebases in 3,000 rows; a
    stream started late (warm start) equals the full pass."""
    returns = market_panel(3000, 6, seed=17)
    full = list(stream(returns, "ewma:hl=2,min=1"))
    with np.errstate(divide="ignore", invalid="ignore"):
        expected = pd.DataFrame(returns).ewm(halflife=2).corr()
    expected = expected.to_numpy().reshape((3000, 6, 6))
    value = np.array([d.value for d in full])
    assert np.isfinite(value[-1]).all()
    assert finite_max_difference(value, expected) <= 1e-10
    late = list(stream(returns, "ewma:hl=2,min=1", start=2500))
    assert finite_max_difference(np.array([d.value for d in late]), value[2500:]) <= 1e-12
    # a tile (not symmetric) over 1,000 rows: rebased a few times too
    tile_days = list(tile(returns, "ewma:hl=2,min=1", [0, 3], [1, 2, 5], start=2000))
    block = value[2000:][:, [0, 3]][:, :, [1, 2, 5]]
    assert finite_max_difference(np.array([d.value for d in tile_days]), block) <= 1e-12
