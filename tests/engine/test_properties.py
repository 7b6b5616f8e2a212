"""Properties every correlation the engine reports must have, on generated data."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.engine import one_day, stream

SPECS = st.sampled_from(["rolling:12", "rolling:12,min=6", "rank:12,min=6", "ewma:hl=6,min=3"])


@st.composite
def gappy_returns(draw: st.DrawFn) -> np.ndarray:
    seed = draw(st.integers(0, 2**32 - 1))
    rows = draw(st.integers(15, 40))
    columns = draw(st.integers(2, 5))
    rng = np.random.default_rng(seed)
    returns = rng.standard_normal((rows, columns)) * draw(st.sampled_from([1e-4, 0.01, 3.0]))
    holes = rng.random((rows, columns)) < draw(st.sampled_from([0.0, 0.1]))
    returns[holes] = np.nan
    return returns


@settings(max_examples=40, deadline=None)
@given(gappy_returns(), SPECS)
def test_values_are_symmetric_and_inside_minus_one_one(returns: np.ndarray, spec: str) -> None:
    for day in stream(returns, spec):
        finite = day.value[np.isfinite(day.value)]
        assert np.all(np.abs(finite) <= 1.0)
        assert np.array_equal(np.isnan(day.value), np.isnan(day.value.T))
        both = np.isfinite(day.value)
        assert np.all(np.abs(day.value - day.value.T)[both] <= 1e-14)
        assert not np.any(np.isinf(day.value))


@settings(max_examples=40, deadline=None)
@given(gappy_returns(), SPECS)
def test_negating_one_series_flips_the_sign_of_its_pairs(returns: np.ndarray, spec: str) -> None:
    flipped = returns.copy()
    flipped[:, 0] = -flipped[:, 0]
    a = one_day(returns, spec)
    b = one_day(flipped, spec)
    assert np.array_equal(np.isnan(a.value), np.isnan(b.value))
    others = np.isfinite(a.value[0, 1:])
    assert np.allclose(b.value[0, 1:][others], -a.value[0, 1:][others], rtol=0, atol=1e-12)
    assert np.allclose(b.value[1:, 1:], a.value[1:, 1:], rtol=0, atol=1e-12, equal_nan=True)


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 2**32 - 1), st.floats(1e-3, 1e3), SPECS)
def test_rescaling_a_price_series_leaves_returns_and_correlations_unchanged(
    seed: int, scale: float, spec: str
) -> None:
    rng = np.random.default_rng(seed)
    closes = 50.0 * np.exp(np.cumsum(rng.standard_normal((40, 3)) * 0.01, axis=0))
    rescaled = closes.copy()
    rescaled[:, 1] *= scale  # e.g. a close quoted in another unit
    returns = np.diff(np.log(closes), axis=0)
    returns_rescaled = np.diff(np.log(rescaled), axis=0)
    assert np.allclose(returns, returns_rescaled, rtol=0, atol=1e-12)
    a = one_day(returns, spec).value
    b = one_day(returns_rescaled, spec).value
    assert np.allclose(a, b, rtol=0, atol=1e-9, equal_nan=True)


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(5, 60))
def test_mean_product_of_population_z_scores_equals_pearson_r(seed: int, rows: int) -> None:
    """Common practice: r = mean of z_x z_y with population (ddof = 0) deviations."""
    rng = np.random.default_rng(seed)
    returns = rng.standard_normal((rows, 2)) * 0.01
    returns[:, 1] += rng.uniform(-1, 1) * returns[:, 0]
    x, y = returns[:, 0], returns[:, 1]
    zx = (x - x.mean()) / x.std()
    zy = (y - y.mean()) / y.std()
    day = one_day(returns, f"rolling:{rows}")
    assert abs(day.value[0, 1] - np.mean(zx * zy)) <= 1e-12
