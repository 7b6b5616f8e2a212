"""Returns: checked against pandas (log diff / pct_change) on data with gaps; no invented zeros."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.data.returns import closes_to_returns
from monitor.errors import ConfigError


@pytest.fixture
def closes() -> pd.DataFrame:
    rng = np.random.default_rng(11)
    index = pd.bdate_range("2023-01-02", periods=60, name="date")
    values = 100 * np.exp(np.cumsum(rng.normal(0, 0.01, size=(60, 3)), axis=0))
    frame = pd.DataFrame(values, index=index, columns=["KLV", "ORMA", "TEZ10"])
    frame.iloc[5, 0] = np.nan
    frame.iloc[20:23, 1] = np.nan
    frame.iloc[:10, 2] = np.nan  # starts trading later
    return frame


def test_log_returns_match_pandas_log_diff(closes: pd.DataFrame) -> None:
    # General-purpose reference: pandas' own diff of log closes.
    expected = np.log(closes).diff().iloc[1:]
    got = closes_to_returns(closes, kind="log")
    pd.testing.assert_frame_equal(got, expected, check_freq=False, rtol=0, atol=1e-15)


def test_simple_returns_match_pandas_pct_change(closes: pd.DataFrame) -> None:
    expected = closes.pct_change(fill_method=None).iloc[1:]
    got = closes_to_returns(closes, kind="simple")
    pd.testing.assert_frame_equal(got, expected, check_freq=False, rtol=0, atol=1e-15)


def test_missing_close_leaves_that_and_the_next_return_missing(closes: pd.DataFrame) -> None:
    got = closes_to_returns(closes)
    # close missing on closes row 5 -> the returns dated closes rows 5 and 6 are missing
    # (returns rows 4 and 5, since returns start at the second close), never zero
    assert got["KLV"].iloc[[2, 3, 6]].notna().all()
    assert got["KLV"].iloc[[4, 5]].isna().tolist() == [True, True]
    assert (got.fillna(1.0) != 0.0).all().all()


def test_fill_limit_carries_forward_at_most_k_days(closes: pd.DataFrame) -> None:
    got = closes_to_returns(closes, fill_limit=1)
    expected = np.log(closes.ffill(limit=1)).diff().iloc[1:]
    pd.testing.assert_frame_equal(got, expected, check_freq=False, rtol=0, atol=1e-15)
    # ORMA's 3-day gap: one day carried (zero return), the rest stays missing
    assert got["ORMA"].iloc[19] == 0.0
    assert got["ORMA"].iloc[20:23].isna().all()


def test_horizon_gives_non_overlapping_returns_ending_on_the_last_date(
    closes: pd.DataFrame,
) -> None:
    got = closes_to_returns(closes, horizon=5)
    assert got.index[-1] == closes.index[-1]
    sampled = closes.iloc[::-1].iloc[::5].iloc[::-1]
    expected = np.log(sampled).diff().iloc[1:]
    pd.testing.assert_frame_equal(got, expected, check_freq=False, rtol=0, atol=1e-15)
    assert len(got) == len(closes) // 5 - (0 if len(closes) % 5 else 1)


def test_rescaling_prices_leaves_returns_unchanged(closes: pd.DataFrame) -> None:
    a = closes_to_returns(closes)
    b = closes_to_returns(closes * 37.5)
    np.testing.assert_allclose(a.to_numpy(), b.to_numpy(), atol=1e-13, equal_nan=True)


def test_bad_parameters_are_config_errors(closes: pd.DataFrame) -> None:
    with pytest.raises(ConfigError, match="returns.horizon"):
        closes_to_returns(closes, horizon=0)
    with pytest.raises(ConfigError, match="returns.kind"):
        closes_to_returns(closes, kind="cubic")  # type: ignore[arg-type]
