"""Rolling Pearson: against pandas, scipy and the two-pass reference, on awkward data."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor.engine import stream
from tests.engine_reference import desk_returns, finite_max_difference, reference_rolling


def engine_cube(returns: np.ndarray, spec: str, **kwargs: object) -> tuple[np.ndarray, ...]:
    days = list(stream(returns, spec, **kwargs))  # type: ignore[arg-type]
    return (
        np.array([d.value for d in days]),
        np.array([d.n for d in days]),
        np.array([d.stale for d in days]),
    )


def pandas_rolling(returns: np.ndarray, window: int, min_periods: int) -> np.ndarray:
    frame = pd.DataFrame(returns)
    with np.errstate(divide="ignore", invalid="ignore"):
        result = frame.rolling(window, min_periods=min_periods).corr()
    rows, columns = returns.shape
    return result.to_numpy().reshape(rows, columns, columns)


@pytest.mark.parametrize(("window", "min_count"), [(30, 30), (30, 20), (12, 5)])
def test_rolling_matches_pandas_rolling_corr_on_gappy_data(window: int, min_count: int) -> None:
    """pandas DataFrame.rolling(W, min_periods=M).corr() (general-purpose reference)."""
    returns = desk_returns()
    value, _, stale = engine_cube(returns, f"rolling:{window},min={min_count}")
    expected = pandas_rolling(returns, window, min_count)
    assert finite_max_difference(value, expected) <= 1e-10
    # where the engine has no value and no stale flag, pandas has none either
    missing = np.isnan(value) & ~stale
    assert np.all(np.isnan(expected[missing]))
    # where pandas has a finite value the engine has one, except constant windows
    assert np.all(np.isfinite(value) | ~np.isfinite(expected) | stale)


@pytest.mark.parametrize(("window", "min_count"), [(30, 30), (30, 20), (5, 3)])
def test_rolling_matches_two_pass_reference_values_counts_and_stale(
    window: int, min_count: int
) -> None:
    returns = desk_returns(rows=200)
    value, n, stale = engine_cube(returns, f"rolling:{window},min={min_count}")
    ref_value, ref_n, ref_stale = reference_rolling(returns, window, min_count)
    assert np.array_equal(np.isnan(value), np.isnan(ref_value))
    assert finite_max_difference(value, ref_value) <= 1e-12
    assert np.array_equal(n, ref_n)
    assert np.array_equal(stale, ref_stale)


def test_rolling_matches_scipy_pearsonr_per_window() -> None:
    """scipy.stats.pearsonr on each window's common days (general-purpose reference)."""
    returns = desk_returns(rows=120)
    window = 25
    value, _, _ = engine_cube(returns, f"rolling:{window},min=10")
    checked = 0
    for t in range(window, returns.shape[0], 7):
        for i, j in [(0, 1), (0, 5), (2, 3), (3, 6), (1, 6)]:
            x = returns[t - window + 1 : t + 1, i]
            y = returns[t - window + 1 : t + 1, j]
            keep = ~(np.isnan(x) | np.isnan(y))
            if keep.sum() < 10:
                continue
            expected = stats.pearsonr(x[keep], y[keep]).statistic
            assert abs(value[t, i, j] - expected) <= 1e-10
            checked += 1
    assert checked > 40


def test_constant_window_gives_nan_and_stale_never_inf() -> None:
    returns = desk_returns()
    value, _, stale = engine_cube(returns, "rolling:30")
    # VOSK (column 4) has zero returns on rows 100..169: windows ending 129..169 are flat
    assert np.all(stale[129:170, 4, [0, 1, 5]])
    assert np.all(np.isnan(value[129:170, 4, :]))
    assert not np.any(stale[128, 4, [0, 1, 5]])
    assert not np.any(np.isinf(value))


def test_values_are_within_bounds_and_the_matrix_is_symmetric() -> None:
    returns = desk_returns()
    value, n, stale = engine_cube(returns, "rolling:20,min=5")
    finite = value[np.isfinite(value)]
    assert finite.size > 0 and np.all(np.abs(finite) <= 1.0)
    # symmetric up to rounding: r(i, j) and r(j, i) multiply the same factors in another order
    assert np.array_equal(np.isnan(value), np.isnan(np.swapaxes(value, 1, 2)))
    assert finite_max_difference(value, np.swapaxes(value, 1, 2)) <= 1e-14
    assert np.array_equal(n, np.swapaxes(n, 1, 2))
    assert np.array_equal(stale, np.swapaxes(stale, 1, 2))


def test_scaled_copies_correlate_to_one_within_rounding_and_never_beyond() -> None:
    rng = np.random.default_rng(3)
    base = rng.standard_normal(300) * 0.013
    scales = np.array([1.0, 3.0, -0.5, 1e-3, 7.0, -2.5, 0.2, 11.0])
    returns = base[:, None] * scales[None, :] + 1e-4 * scales[None, :]
    value, _, _ = engine_cube(returns, "rolling:40")
    ready = value[39:]
    expected = np.sign(scales[:, None] * scales[None, :])
    assert np.max(np.abs(ready - expected)) <= 1e-14
    # rounding may push a perfect correlation past 1; the clip keeps it inside
    assert np.all(np.abs(ready) <= 1.0)
