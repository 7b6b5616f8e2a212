"""Rolling Spearman: average ranks over each pair's common days, against scipy."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from monitor.engine import average_ranks, stream
from tests.engine_reference import desk_returns, finite_max_difference, reference_rolling


def engine_cube(returns: np.ndarray, spec: str) -> tuple[np.ndarray, ...]:
    days = list(stream(returns, spec))
    return (
        np.array([d.value for d in days]),
        np.array([d.n for d in days]),
        np.array([d.stale for d in days]),
    )


def test_rank_matches_scipy_spearmanr_per_window_with_gaps_and_ties() -> None:
    """scipy.stats.spearmanr on each pair's common days (general-purpose reference)."""
    returns = desk_returns(rows=150)
    # ties: quantise two instruments so that equal returns recur inside windows
    returns[:, 1] = np.round(returns[:, 1], 3)
    returns[:, 3] = np.round(returns[:, 3], 2)
    value, n, stale = engine_cube(returns, "rank:25,min=12")
    ref_value, ref_n, ref_stale = reference_rolling(returns, 25, 12, rank=True)
    assert np.array_equal(np.isnan(value), np.isnan(ref_value))
    assert finite_max_difference(value, ref_value) <= 1e-12
    assert np.array_equal(n, ref_n)
    assert np.array_equal(stale, ref_stale)


def test_rank_is_invariant_to_monotone_transforms_of_a_series() -> None:
    returns = desk_returns(rows=120)
    transformed = returns.copy()
    transformed[:, 0] = np.exp(50 * returns[:, 0])  # strictly increasing map
    a, _, _ = engine_cube(returns, "rank:30,min=20")
    b, _, _ = engine_cube(transformed, "rank:30,min=20")
    assert np.array_equal(np.isnan(a), np.isnan(b))
    assert finite_max_difference(a, b) <= 1e-12


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.one_of(st.integers(-3, 3).map(float), st.just(float("nan"))), min_size=1, max_size=30
    )
)
def test_average_ranks_equal_scipy_rankdata_on_valid_entries(values: list[float]) -> None:
    """scipy.stats.rankdata(method="average") on the non-missing entries."""
    data = np.array(values)
    ranks = average_ranks(data[None, :])[0]
    valid = ~np.isnan(data)
    assert np.all(np.isnan(ranks[~valid]))
    if valid.any():
        assert np.array_equal(ranks[valid], stats.rankdata(data[valid], method="average"))
