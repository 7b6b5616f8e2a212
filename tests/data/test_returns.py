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


def _own_close_reference(closes: pd.DataFrame, kind: str, max_gap: int = 5) -> pd.DataFrame:
    """Reference: pandas on each column's own closes (dropna, then log diff or pct_change),
    a return kept when pandas' business-day range between the two closes is short enough,
    laid back on the panel's dates."""
    columns = {}
    for name in closes.columns:
        own = closes[name].dropna()
        step = np.log(own).diff() if kind == "log" else own.pct_change()
        spans = [len(pd.bdate_range(a, b)) - 1 for a, b in zip(own.index[:-1], own.index[1:],
                                                                   strict=True)]
        keep = np.array([False] + [span <= max_gap for span in spans])
        columns[name] = step.where(keep).reindex(closes.index)
    return pd.DataFrame(columns).iloc[1:]


@pytest.mark.parametrize("kind", ["log", "simple"])
def test_returns_match_pandas_on_each_instruments_own_closes(
    closes: pd.DataFrame, kind: str
) -> None:
    expected = _own_close_reference(closes, kind)
    got = closes_to_returns(closes, kind=kind)  # type: ignore[arg-type]
    pd.testing.assert_frame_equal(got, expected, check_freq=False, check_names=False,
                                  rtol=0, atol=1e-15)


def test_log_returns_match_pandas_log_diff_without_gaps(closes: pd.DataFrame) -> None:
    # General-purpose reference: pandas' own diff of log closes, on complete columns.
    full = closes.iloc[10:, [0]].drop(closes.index[15])
    expected = np.log(full).diff().iloc[1:]
    pd.testing.assert_frame_equal(closes_to_returns(full), expected, check_freq=False,
                                  rtol=0, atol=1e-15)


def test_a_missing_close_leaves_only_that_days_return_missing(closes: pd.DataFrame) -> None:
    got = closes_to_returns(closes)
    c = closes["KLV"].to_numpy()
    # close missing on closes row 5: the return dated row 5 is missing, the one dated row 6
    # runs from row 4's close (two business days), never a zero
    assert np.isnan(got["KLV"].iloc[4])
    assert got["KLV"].iloc[5] == pytest.approx(np.log(c[6] / c[4]), rel=1e-15)
    assert (got.fillna(1.0) != 0.0).all().all()
    # ORMA has no close on rows 20..22: its return on row 23 spans four business days
    o = closes["ORMA"].to_numpy()
    assert got["ORMA"].iloc[22] == pytest.approx(np.log(o[23] / o[19]), rel=1e-15)
    assert got["ORMA"].iloc[19:22].isna().all()


def test_a_gap_longer_than_max_gap_leaves_the_return_missing(closes: pd.DataFrame) -> None:
    # ORMA's closes on rows 19 and 23 are four business days apart
    assert np.isnan(closes_to_returns(closes, max_gap=3)["ORMA"].iloc[22])
    assert np.isfinite(closes_to_returns(closes, max_gap=4)["ORMA"].iloc[22])
    # a weekend is not a gap: Friday to Monday is one business day
    assert closes.index[4].day_name() == "Friday"
    assert np.isfinite(closes_to_returns(closes, max_gap=1)["KLV"].iloc[3])
    with pytest.raises(ConfigError, match="returns.max_gap"):
        closes_to_returns(closes, max_gap=0)


def test_a_return_does_not_depend_on_the_other_columns(closes: pd.DataFrame) -> None:
    # Another instrument trading on KLV's missing days adds rows to the panel; KLV's
    # returns on its own dates stay the same.
    extra = pd.DataFrame({"WEEKEND": 50.0}, index=pd.DatetimeIndex(
        ["2023-01-07", "2023-01-14", "2023-02-04"], name="date"))
    wide = pd.concat([closes, extra]).sort_index()
    alone = closes_to_returns(closes[["KLV"]].dropna())["KLV"]
    together = closes_to_returns(wide)["KLV"]
    pd.testing.assert_series_equal(together.dropna(), alone.dropna(), check_freq=False,
                                   rtol=0, atol=0)


def test_fill_limit_carries_forward_at_most_k_days(closes: pd.DataFrame) -> None:
    got = closes_to_returns(closes, fill_limit=1)
    expected = _own_close_reference(closes.ffill(limit=1), "log")
    pd.testing.assert_frame_equal(got, expected, check_freq=False, check_names=False,
                                  rtol=0, atol=1e-15)
    # ORMA's 3-day gap: one day carried (zero return), the next two missing
    assert got["ORMA"].iloc[19] == 0.0
    assert got["ORMA"].iloc[20:22].isna().all()


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
