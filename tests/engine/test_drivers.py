"""Drivers: per-day contributions that add up to the rolling correlation."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.engine import drivers, one_day
from monitor.errors import EngineInputError
from tests.engine_reference import desk_returns


@pytest.mark.parametrize(("i", "j", "t"), [(0, 1, 120), (0, 5, 259), (3, 6, 200), (2, 3, 60)])
def test_contributions_sum_to_the_engine_value(i: int, j: int, t: int) -> None:
    returns = desk_returns()
    explained = drivers(returns, i, j, t, 30)
    engine = one_day(returns, "rolling:30,min=2", t).value[i, j]
    assert explained.contributions.sum() == pytest.approx(explained.value, abs=1e-14)
    assert explained.value == pytest.approx(engine, abs=1e-12)
    window_days = np.arange(t - 29, t + 1)
    valid = ~(np.isnan(returns[window_days, i]) | np.isnan(returns[window_days, j]))
    assert np.array_equal(explained.days, window_days[valid])


def test_ranked_puts_the_day_that_pulled_hardest_first() -> None:
    rng = np.random.default_rng(9)
    returns = rng.standard_normal((50, 2)) * 0.01
    returns[41] = [0.08, 0.07]  # one joint shock inside the last window
    explained = drivers(returns, 0, 1, 49, 20)
    days, contributions = explained.ranked()
    assert days[0] == 41
    assert np.all(np.diff(contributions) <= 0)
    low_days, _ = explained.ranked(descending=False)
    assert low_days[-1] == 41


def test_a_constant_side_has_no_drivers() -> None:
    returns = desk_returns()
    explained = drivers(returns, 0, 4, 150, 30)  # VOSK's close is stale on rows 100..169
    assert np.isnan(explained.value) and np.isnan(explained.contributions).all()


def test_window_shorter_than_three_is_a_config_error() -> None:
    with pytest.raises(EngineInputError, match="drivers window"):
        drivers(desk_returns(), 0, 1, 100, 2)


# --- every measure: the contributions add up to the alert's value ----------------------


@pytest.mark.parametrize("measure", ["rolling:40", "rank:40", "ewma:hl=15",
                                     "ewma:hl=15,mean=zero", "rank:40,scale=vol"])
def test_contributions_of_every_measure_sum_to_its_value(measure: str) -> None:
    """The value: the pair-dates stream (the rules' numbers); Spearman also checked against
    scipy.stats.spearmanr and the weighted EWMA against pandas ewm(halflife).corr."""
    import pandas as pd
    from scipy import stats

    from monitor.engine import stream_on_pair_dates
    from monitor.engine.drivers import measure_drivers
    from tests.engine.test_pairdates import _calendars

    values = _calendars()
    for i, j in ((0, 1), (0, 2), (1, 3), (2, 4)):
        for t in (150, 399):
            found = measure_drivers(values, i, j, t, measure)
            engine = next(stream_on_pair_dates(values, measure, np.array([[i, j]]), start=t,
                                               stop=t + 1)).value[0]
            assert found.contributions.sum() == pytest.approx(engine, abs=1e-10)
            assert found.value == pytest.approx(engine, abs=1e-10)
            own = pd.DataFrame(values[:t + 1, [i, j]]).dropna()
            if measure == "rank:40":
                window = own.iloc[-40:]
                rho = stats.spearmanr(window[0], window[1]).statistic
                assert found.contributions.sum() == pytest.approx(rho, abs=1e-12)
                assert len(found.days) == 40
            if measure == "ewma:hl=15":
                expected = own[0].ewm(halflife=15).corr(own[1]).iloc[-1]
                assert found.contributions.sum() == pytest.approx(expected, abs=1e-10)
