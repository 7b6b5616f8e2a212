"""Fisher z confidence bands."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from monitor.engine import fisher_band, normal_quantile, one_day
from monitor.errors import EngineInputError


def test_fisher_band_worked_value() -> None:
    """REFERENCES.md: Fisher (1915, 1921), r = 0.5, n = 50, 95 % -> (0.2574879, 0.6832563)."""
    low, high = fisher_band(0.5, 50, 0.95)
    assert low == pytest.approx(0.2574879, abs=5e-8)
    assert high == pytest.approx(0.6832563, abs=5e-8)


@pytest.mark.parametrize("level", [0.8, 0.95, 0.99])
def test_fisher_band_equals_scipy_pearsonr_confidence_interval(level: float) -> None:
    """scipy.stats.pearsonr(...).confidence_interval() (general-purpose reference)."""
    rng = np.random.default_rng(21)
    x = rng.standard_normal(40)
    y = 0.4 * x + rng.standard_normal(40)
    result = stats.pearsonr(x, y)
    interval = result.confidence_interval(confidence_level=level)
    low, high = fisher_band(result.statistic, 40, level)
    assert low == pytest.approx(interval.low, abs=1e-12)
    assert high == pytest.approx(interval.high, abs=1e-12)


def test_band_is_nan_at_three_observations_or_fewer_and_finite_at_plus_minus_one() -> None:
    low, high = fisher_band(np.array([0.3, 0.3, 1.0, -1.0, np.nan]), np.array([3, 2, 30, 30, 30]))
    assert np.isnan(low[:2]).all() and np.isnan(high[:2]).all()
    assert (low[2], high[2]) == (1.0, 1.0)
    assert (low[3], high[3]) == (-1.0, -1.0)
    assert np.isnan(low[4]) and np.isnan(high[4])


def test_band_narrows_with_more_observations_and_widens_with_level() -> None:
    narrow = np.subtract(*fisher_band(0.4, 200)[::-1])
    wide = np.subtract(*fisher_band(0.4, 30)[::-1])
    wider = np.subtract(*fisher_band(0.4, 30, 0.99)[::-1])
    assert narrow < wide < wider


def test_day_result_band_uses_its_count_and_level() -> None:
    rng = np.random.default_rng(4)
    returns = rng.standard_normal((100, 3)) * 0.01
    day = one_day(returns, "rolling:60", level=0.9)
    low, high = fisher_band(day.value, 60, 0.9)
    assert np.array_equal(day.low, low, equal_nan=True)
    assert np.array_equal(day.high, high, equal_nan=True)


@pytest.mark.parametrize("level", [0.0, 1.0, 1.5, -0.2, "high"])
def test_levels_outside_zero_one_are_config_errors(level: object) -> None:
    with pytest.raises(EngineInputError, match="confidence level"):
        normal_quantile(level)  # type: ignore[arg-type]


def test_normal_quantile_equals_scipy_norm_ppf() -> None:
    """scipy.stats.norm.ppf (general-purpose reference); 1.959964 at 95 %."""
    for level in (0.5, 0.9, 0.95, 0.999):
        assert normal_quantile(level) == pytest.approx(stats.norm.ppf((1 + level) / 2), rel=1e-12)


def test_band_with_one_count_for_every_pair_equals_the_per_pair_formula() -> None:
    """The shortcut for equal counts (gap-free windows) gives the textbook band:
    tanh(atanh r +- q / sqrt(n - 3)) (Fisher z; REFERENCES.md), pair by pair."""
    import math

    import numpy as np

    from monitor.engine.bands import fisher_band, normal_quantile

    rng = np.random.default_rng(3)
    r = rng.uniform(-0.99, 0.99, 500)
    n = np.full(500, 63.0)
    low, high = fisher_band(r, n, 0.95)
    q = normal_quantile(0.95)
    for k in range(0, 500, 37):
        z = math.atanh(r[k])
        assert abs(low[k] - math.tanh(z - q / math.sqrt(60))) < 1e-12
        assert abs(high[k] - math.tanh(z + q / math.sqrt(60))) < 1e-12
    mixed = n.copy()
    mixed[7] = np.nan
    low_mixed, _ = fisher_band(r, mixed, 0.95)
    assert np.isnan(low_mixed[7]) and abs(low_mixed[8] - low[8]) < 1e-15
