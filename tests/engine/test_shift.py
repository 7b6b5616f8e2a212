"""Shift tests: nested short-in-long windows and adjacent windows."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from monitor.engine import (
    adjacent_shift,
    independent_z,
    nested_shift,
    nested_z,
    one_day,
    two_sided_p,
)
from monitor.errors import EngineInputError


def test_difference_of_independent_correlations_worked_value() -> None:
    """psych::r.test documentation example: r1 = 0.5, n1 = 100 vs r2 = 0.4, n2 = 80
    -> z = 0.82, two-sided p = 0.41 (REFERENCES.md)."""
    z = independent_z(0.5, 100, 0.4, 80)
    assert round(float(z), 2) == 0.82
    assert round(float(two_sided_p(z)), 2) == 0.41


def test_two_sided_p_equals_scipy_normal_survival() -> None:
    """scipy.stats.norm.sf (general-purpose reference), also far in the tail."""
    z = np.array([0.0, 0.5, -1.96, 3.0, 8.0, -12.0])
    assert np.allclose(two_sided_p(z), 2 * stats.norm.sf(np.abs(z)), rtol=1e-12, atol=0)
    assert np.isnan(two_sided_p(np.nan))


def test_nested_z_uses_the_difference_of_variances() -> None:
    """REFERENCES.md: var(z_short - z_long) ~ 1/(n_short - 3) - 1/(n_long - 3)."""
    z = nested_z(0.8, 23, 0.5, 103)
    expected = (np.arctanh(0.8) - np.arctanh(0.5)) / np.sqrt(1 / 20 - 1 / 100)
    assert float(z) == pytest.approx(expected, rel=1e-14)
    assert np.isnan(nested_z(0.5, 50, 0.5, 50))
    assert np.isnan(nested_z(0.5, 3, 0.2, 50))


def regime_change(rows: int = 400, change: int = 300) -> np.ndarray:
    """Fictional KLV and ORMA: unrelated until row ``change``, then tied (r about 0.9)."""
    rng = np.random.default_rng(17)
    returns = rng.standard_normal((rows, 3)) * 0.01
    common = rng.standard_normal(rows - change) * 0.01
    returns[change:, 0] = common + 0.003 * rng.standard_normal(rows - change)
    returns[change:, 1] = common + 0.003 * rng.standard_normal(rows - change)
    return returns


def test_adjacent_shift_sees_a_planted_change_and_not_a_quiet_pair() -> None:
    returns = regime_change()
    result = adjacent_shift(returns, 359, window=60, pairs=[[0, 1], [0, 2]])
    assert result.z[0] > 5 and result.p[0] < 1e-6
    assert abs(result.z[1]) < 3
    recent = one_day(returns, "rolling:60", 359, pairs=[[0, 1], [0, 2]])
    previous = one_day(returns, "rolling:60", 299, pairs=[[0, 1], [0, 2]])
    assert np.array_equal(result.recent, recent.value)
    assert np.array_equal(result.reference, previous.value)
    expected = independent_z(recent.value, recent.n, previous.value, previous.n)
    assert np.array_equal(result.z, expected)


def test_nested_shift_compares_the_short_window_with_the_long_one() -> None:
    returns = regime_change()
    result = nested_shift(returns, 330, short=30, long=250)
    assert result.z.shape == (3, 3)
    short = one_day(returns, "rolling:30", 330)
    long = one_day(returns, "rolling:250", 330)
    assert np.allclose(result.z, nested_z(short.value, short.n, long.value, long.n), equal_nan=True)
    assert result.z[0, 1] > 5


def test_adjacent_shift_without_a_previous_window_is_nan() -> None:
    result = adjacent_shift(regime_change(), 50, window=60)
    assert np.isnan(result.z).all() and (result.reference_n == 0).all()


@pytest.mark.parametrize(
    ("kwargs", "fragment"),
    [({"short": 3, "long": 60}, "short window"), ({"short": 60, "long": 30}, "< long")],
)
def test_bad_shift_windows_are_config_errors(kwargs: dict[str, int], fragment: str) -> None:
    with pytest.raises(EngineInputError, match=fragment):
        nested_shift(regime_change(), -1, **kwargs)
    with pytest.raises(EngineInputError, match="adjacent window"):
        adjacent_shift(regime_change(), -1, window=2)
