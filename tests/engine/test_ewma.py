"""EWMA correlation: pandas' ewm().corr(), Kish's effective count, Hull's zero-mean recursion."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from monitor.engine import hull_update, kish_effective_count, one_day, parse_measure, stream
from tests.engine_reference import desk_returns, finite_max_difference, reference_ewma


def engine_cube(returns: np.ndarray, spec: str, **kwargs: object) -> tuple[np.ndarray, ...]:
    days = list(stream(returns, spec, **kwargs))  # type: ignore[arg-type]
    return (
        np.array([d.value for d in days]),
        np.array([d.n for d in days]),
        np.array([d.stale for d in days]),
    )


def pandas_ewm(returns: np.ndarray, half_life: float) -> np.ndarray:
    frame = pd.DataFrame(returns)
    with np.errstate(divide="ignore", invalid="ignore"):
        result = frame.ewm(halflife=half_life, adjust=True, ignore_na=False).corr()
    rows, columns = returns.shape
    return result.to_numpy().reshape(rows, columns, columns)


@pytest.mark.parametrize("half_life", [5.0, 21.0])
def test_weighted_ewma_matches_pandas_ewm_corr_with_gaps(half_life: float) -> None:
    """pandas df.ewm(halflife=H, adjust=True, ignore_na=False).corr() (pandas 3.1)."""
    returns = desk_returns()
    value, _, stale = engine_cube(returns, f"ewma:hl={half_life:g},min=1")
    expected = pandas_ewm(returns, half_life)
    assert finite_max_difference(value, expected) <= 1e-10
    # same defined/undefined pattern; pandas has no value where the engine flags stale
    assert np.array_equal(np.isfinite(value), np.isfinite(expected))
    assert not np.any(np.isfinite(expected[stale]))


@pytest.mark.parametrize(
    ("spec", "centred"),
    [("ewma:hl=7,min=4", True), ("ewma:lambda=0.9,mean=zero,min=3", False)],
)
def test_ewma_matches_weighted_two_pass_reference(spec: str, centred: bool) -> None:
    returns = desk_returns(rows=150)
    measure = parse_measure(spec)
    assert measure.lam is not None
    value, n, stale = engine_cube(returns, spec)
    ref_value, ref_n, ref_stale = reference_ewma(
        returns, measure.lam, measure.min_count, centred=centred
    )
    assert np.array_equal(np.isnan(value), np.isnan(ref_value))
    assert finite_max_difference(value, ref_value) <= 1e-12
    assert np.max(np.abs(n - ref_n)) <= 1e-10
    assert np.array_equal(stale, ref_stale)


def test_kish_effective_count_of_lambda_094_tends_to_3233() -> None:
    """Kish (1965): n_eff = (sum w)^2 / sum w^2 -> (1 + lambda) / (1 - lambda) = 32.33."""
    weights = 0.94 ** np.arange(2000)
    assert kish_effective_count(weights) == pytest.approx(32.33, abs=0.005)
    assert kish_effective_count(weights) == pytest.approx(1.94 / 0.06, rel=1e-12)


def test_engine_reports_the_kish_count_of_its_weights() -> None:
    """The n of a long, gap-free EWMA is Kish's (1 + lambda) / (1 - lambda) = 32.33."""
    rng = np.random.default_rng(11)
    returns = rng.standard_normal((1500, 3)) * 0.01
    day = one_day(returns, "ewma:lambda=0.94")
    assert np.allclose(day.n, 1.94 / 0.06, rtol=1e-12)
    short = one_day(returns[:5], "ewma:lambda=0.94,min=1")
    w = 0.94 ** np.arange(5)
    assert np.allclose(short.n, w.sum() ** 2 / (w * w).sum(), rtol=1e-12)


def test_hull_worked_example_of_the_zero_mean_update() -> None:
    """Hull, Risk Management and Financial Institutions (correlations and copulas chapter):
    lambda 0.95, previous correlation 0.6, vols 1% and 2%, latest returns 0.5% and 2.5%
    -> covariance 0.00012025, correlation 0.6044."""
    cov, var_x, var_y = hull_update(0.6 * 0.01 * 0.02, 0.01**2, 0.02**2, 0.005, 0.025, 0.95)
    assert cov == pytest.approx(0.00012025, rel=1e-12)
    assert cov / math.sqrt(var_x * var_y) == pytest.approx(0.6044, abs=5e-5)


def test_zero_mean_engine_follows_hull_recursion_once_weights_converge() -> None:
    """After the weight sum reaches 1 / (1 - lambda) the engine's step is Hull's, with the
    engine's value at row t being Hull's estimate for day t + 1 (it includes row t)."""
    rng = np.random.default_rng(5)
    returns = rng.standard_normal((900, 2)) * np.array([0.01, 0.02])
    returns[:, 1] += 0.012 * returns[:, 0] / 0.01
    lam = 0.95
    days = list(stream(returns, "ewma:lambda=0.95,mean=zero", start=880))
    # rebuild the state at row 879 from the closed form, then step with Hull's update
    w = lam ** np.arange(879, -1, -1)
    head = returns[:880]
    cov = np.sum(w * head[:, 0] * head[:, 1]) / w.sum()
    var_x = np.sum(w * head[:, 0] ** 2) / w.sum()
    var_y = np.sum(w * head[:, 1] ** 2) / w.sum()
    for day in days:
        x, y = returns[day.t]
        cov, var_x, var_y = hull_update(cov, var_x, var_y, x, y, lam)
        assert day.value[0, 1] == pytest.approx(cov / math.sqrt(var_x * var_y), abs=1e-12)


def test_default_minimum_effective_count_is_the_half_life() -> None:
    returns = np.random.default_rng(2).standard_normal((60, 2)) * 0.01
    value, n, _ = engine_cube(returns, "ewma:hl=10")
    assert parse_measure("ewma:hl=10").min_count == 10
    defined = np.isfinite(value[:, 0, 1])
    assert np.array_equal(defined, n[:, 0, 1] >= 10)
    assert defined.any() and not defined.all()


def test_a_pair_without_new_common_returns_keeps_its_value() -> None:
    """With weights that age alike, a pause changes neither the value nor n_eff (pandas)."""
    returns = desk_returns()
    value, n, _ = engine_cube(returns, "ewma:hl=10")
    # NIRA (column 6) has no returns on rows 150..174
    assert np.allclose(value[150:175, 0, 6], value[149, 0, 6], rtol=0, atol=1e-15)
    assert np.allclose(n[150:175, 0, 6], n[149, 0, 6], rtol=1e-12)


def test_a_series_flat_since_its_first_return_is_stale_not_a_number() -> None:
    rng = np.random.default_rng(8)
    returns = rng.standard_normal((80, 3)) * 0.01
    returns[:30, 2] = 0.0  # a newly listed instrument whose close did not move for 30 days
    value, _, stale = engine_cube(returns, "ewma:hl=5")
    ref_value, _, ref_stale = reference_ewma(returns, 0.5 ** (1 / 5), 5)
    assert np.array_equal(stale, ref_stale)
    assert stale[10:30, 0, 2].all() and not stale[30:, 0, 2].any()
    assert np.all(np.isnan(value[:30, 0, 2]))
    assert finite_max_difference(value, ref_value) <= 1e-12
