"""Regression measures ``beta:...`` and ``r2:...``: slope and R squared of the second
instrument's returns on the first's (with a constant), against statsmodels' RollingOLS on
real index closes and against a direct least-squares fit."""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable
from pathlib import Path

import arch.data.nasdaq as arch_nasdaq  # test dependency: real index closes
import arch.data.sp500 as arch_data
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm  # test dependency: the outside reference
import statsmodels.regression.rolling as rolling_ols

from monitor import api
from monitor.cli import main
from monitor.config import Settings
from monitor.engine import parse_measure, stream, stream_on_pair_dates
from monitor.errors import EngineInputError, SpecError


@pytest.fixture(scope="module")
def index_closes() -> pd.DataFrame:
    """Real daily closes of two stock indices, 1999 to 2018, as shipped in the `arch`
    package (arch.data.sp500 and arch.data.nasdaq, 'Adj Close'), under our own codes."""
    first = arch_data.load()["Adj Close"]
    second = arch_nasdaq.load()["Adj Close"]
    closes = pd.DataFrame({"IDXA": first, "IDXB": second}).dropna()
    closes.index = pd.DatetimeIndex(closes.index).normalize()
    closes.index.name = "date"
    return closes


@pytest.fixture(scope="module")
def index_returns(index_closes: pd.DataFrame) -> pd.DataFrame:
    return np.log(index_closes).diff().iloc[1:]


def _rolling_ols(returns: pd.DataFrame, window: int):  # type: ignore[no-untyped-def]
    # statsmodels.regression.rolling.RollingOLS, B on a constant and A
    exog = sm.add_constant(returns["IDXA"])
    return rolling_ols.RollingOLS(returns["IDXB"], exog, window=window).fit()


def test_spec_grammar_round_trips_and_refuses_scale() -> None:
    for text in ("beta:60", "r2:60", "beta:60,min=40", "beta:hl=21", "r2:lambda=0.94",
                 "beta:hl=21,mean=zero"):
        measure = parse_measure(text)
        assert measure.text == text
        assert parse_measure(measure.text) == measure
        assert measure.output == text.partition(":")[0]
    assert parse_measure("beta:60").correlation == parse_measure("rolling:60")
    assert parse_measure("r2:hl=21").correlation == parse_measure("ewma:hl=21")
    with pytest.raises(SpecError, match="does not take scale="):
        parse_measure("beta:60,scale=vol")
    with pytest.raises(SpecError, match="window must be >= 3"):
        parse_measure("r2:2")


def test_beta_and_r2_equal_rolling_ols_on_real_index_returns(
    index_returns: pd.DataFrame,
) -> None:
    fit = _rolling_ols(index_returns, 60)
    beta = api.correlations(index_returns, "beta:60", pairs=[("IDXA", "IDXB")])
    r2 = api.correlations(index_returns, "r2:60", pairs=[("IDXA", "IDXB")])
    slope = fit.params["IDXA"].to_numpy()
    # the same dates are NaN (the first 59) and every other date agrees to 1e-10
    assert np.array_equal(np.isnan(beta["value"]), np.isnan(slope))
    assert np.isnan(slope).sum() == 59
    np.testing.assert_allclose(beta["value"], slope, rtol=0, atol=1e-10)
    np.testing.assert_allclose(r2["value"], fit.rsquared.to_numpy(), rtol=0, atol=1e-10)
    # the band is slope +- z * the OLS standard error of the slope (RollingOLS.bse)
    half = (beta["high"] - beta["value"]).to_numpy()
    np.testing.assert_allclose(half, 1.959963984540054 * fit.bse["IDXA"].to_numpy(),
                               rtol=1e-9, atol=0)
    shown = r2.dropna(subset=["value"])
    assert len(shown) == len(r2) - 59
    assert (shown["low"] <= shown["value"]).all() and (shown["value"] <= shown["high"]).all()
    assert ((shown["low"] >= 0) & (shown["high"] <= 1)).all()


def test_beta_on_gappy_panel_is_the_pair_on_its_own_dates(
    index_returns: pd.DataFrame,
) -> None:
    """A pair whose sides miss different days: the window is W of its common dates."""
    rng = np.random.default_rng(7)
    gappy = index_returns.iloc[:800].copy()
    gappy.loc[rng.random(len(gappy)) < 0.05, "IDXA"] = np.nan
    gappy.loc[rng.random(len(gappy)) < 0.05, "IDXB"] = np.nan
    frame = api.correlations(gappy, "beta:40", pairs=[("IDXA", "IDXB")])
    common = gappy.dropna()
    fit = _rolling_ols(common, 40)
    on_common = frame.set_index("date")["value"].reindex(common.index)
    np.testing.assert_allclose(on_common, fit.params["IDXA"].to_numpy(), rtol=0, atol=1e-10)
    # a day with a gap keeps the value of the pair's last own date
    missing = gappy.index[gappy["IDXA"].isna()][-1]
    before = common.index[common.index < missing][-1]
    values = frame.set_index("date")["value"]
    assert values[missing] == values[before]


def test_ewma_beta_is_the_weighted_least_squares_slope(index_returns: pd.DataFrame) -> None:
    data = index_returns.iloc[:300]
    frame = api.correlations(data, "beta:hl=21", pairs=[("IDXA", "IDXB")])
    r2 = api.correlations(data, "r2:hl=21", pairs=[("IDXA", "IDXB")])
    lam = 0.5 ** (1 / 21)
    for t in (50, 150, 299):
        w = lam ** np.arange(t, -1, -1.0)
        x, y = data["IDXA"].to_numpy()[: t + 1], data["IDXB"].to_numpy()[: t + 1]
        # numpy.polyfit weights multiply the residuals: sqrt(w) gives weighted least squares
        slope, intercept = np.polyfit(x, y, 1, w=np.sqrt(w))
        assert frame["value"].iloc[t] == pytest.approx(slope, abs=1e-10)
        fitted = intercept + slope * x
        ybar = np.average(y, weights=w)
        r_squared = 1 - (w @ (y - fitted) ** 2) / (w @ (y - ybar) ** 2)
        assert r2["value"].iloc[t] == pytest.approx(r_squared, abs=1e-10)


def test_stream_refuses_regression_measures_with_a_pointer() -> None:
    returns = np.random.default_rng(1).normal(size=(30, 2))
    with pytest.raises(EngineInputError, match="stream_on_pair_dates"):
        stream(returns, "beta:10")
    days = list(stream_on_pair_dates(returns, "beta:10", [(0, 1)]))
    assert days[-1].ratio is not None and days[-1].r is not None


def test_series_command_prints_beta_and_r2_equal_to_rolling_ols(
    tmp_path: Path, write_settings: Callable[..., Settings], index_closes: pd.DataFrame,
    capsys: pytest.CaptureFixture[str],
) -> None:
    from monitor.pipeline import ingest_file, init_store

    desk = """
[desk]
name = "Halden Test Desk"
timezone = "Europe/Berlin"

[[instruments]]
symbol = "IDXA"
name = "Index A"
group = "indices"

[[instruments]]
symbol = "IDXB"
name = "Index B"
group = "indices"
"""
    closes = index_closes.iloc[-400:]
    path = tmp_path / "closes.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", desk)
    store = init_store(settings)
    ingest_file(store, settings, path, today=dt.date(2019, 1, 2))
    store.dispose()
    fit = _rolling_ols(np.log(closes).diff().iloc[1:], 60)
    for spec, expected in (("beta:60", fit.params["IDXA"]), ("r2:60", fit.rsquared)):
        assert main(["series", "IDXA", "IDXB", "--measure", spec, "--format", "json",
                     "--config", str(settings.path)]) == 0
        rows = json.loads(capsys.readouterr().out)
        printed = pd.Series({pd.Timestamp(row["date"]): row["value"] for row in rows})
        reference = expected.dropna()
        assert {row["measure"] for row in rows} == {spec}
        assert len(reference) == 400 - 60
        np.testing.assert_allclose(printed.reindex(reference.index).astype(float),
                                   reference.to_numpy(), rtol=0, atol=1e-10)
