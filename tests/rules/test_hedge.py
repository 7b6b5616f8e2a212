"""The ``hedge`` rule on planted cases: a ratio that drifts out of range, an R squared that
collapses, both coming back; and its bad-config messages."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor import api
from monitor.errors import ConfigError

DAYS = 600


def _returns(beta: np.ndarray, noise: np.ndarray, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = rng.standard_t(5, DAYS) * 0.01  # fat tails
    b = beta * a + noise * rng.standard_normal(DAYS)
    dates = pd.bdate_range("2025-01-01", periods=DAYS)
    return pd.DataFrame({"HDGA": a, "HDGB": b}, index=dates)


def _events(returns: pd.DataFrame, **keys: object) -> pd.DataFrame:
    rule = {"name": "hedge-check", "kind": "hedge", "measure": "beta:60",
            "pairs": ["HDGA/HDGB"], "hold": 2, "remind_every": 0, **keys}
    events = api.evaluate(returns, [rule])
    return events[events["event"].isin(["opened", "cleared"])].reset_index(drop=True)


def test_ratio_drift_opens_and_clears() -> None:
    beta = np.where((np.arange(DAYS) >= 200) & (np.arange(DAYS) < 400), 1.6, 1.0)
    returns = _returns(beta, np.full(DAYS, 0.002))
    events = _events(returns)
    assert list(events["event"]) == ["opened", "cleared"]
    opened, cleared = events["date"]
    days = returns.index
    # never before the change, and within one 60-day window after it
    assert days[200] < opened <= days[260]
    assert days[400] < cleared <= days[460]
    assert events["value"].iloc[0] > 1.25
    assert events["level"].iloc[0] == 1.25  # the end of the range it left
    assert events["reference"].iloc[0] >= 0.8  # R squared (reference) still fine
    assert 0.8 + 0.05 <= abs(events["value"].iloc[1]) <= 1.25 - 0.05


def test_r2_collapse_opens_and_clears() -> None:
    noise = np.where((np.arange(DAYS) >= 200) & (np.arange(DAYS) < 400), 0.03, 0.002)
    returns = _returns(np.ones(DAYS), noise, seed=5)
    events = _events(returns)
    assert list(events["event"]) == ["opened", "cleared"]
    opened, cleared = events["date"]
    assert returns.index[200] < opened <= returns.index[260]
    assert returns.index[400] < cleared <= returns.index[460]
    first = events.iloc[0]
    assert first["reference"] < 0.8 and first["level"] == 0.8  # opened on R squared
    assert 0.8 <= abs(first["value"]) <= 1.25  # the ratio itself stayed in range
    assert first["low"] < first["value"] < first["high"]  # the ratio's band
    assert events["reference"].iloc[1] >= 0.85  # cleared past the dead-band


def test_a_steady_hedge_raises_nothing() -> None:
    returns = _returns(np.full(DAYS, 0.97), np.full(DAYS, 0.002), seed=11)
    assert _events(returns).empty
    # the same pair opens with a tighter range of our own choosing
    tight = _events(returns, ratio_low=0.99, ratio_high=1.3)
    assert list(tight["event"])[:1] == ["opened"]


def test_negative_ratio_is_read_in_absolute_value() -> None:
    returns = _returns(np.full(DAYS, -1.0), np.full(DAYS, 0.002), seed=13)
    assert _events(returns).empty


@pytest.mark.parametrize(("keys", "message"), [
    ({"measure": "rolling:60"}, "not a beta: measure"),
    ({"ratio_low": 1.2, "ratio_high": 1.25}, "must exceed ratio_low"),
    ({"min_r2": 0.98, "margin": 0.05}, "could never clear"),
])
def test_bad_config_is_named(keys: dict[str, object], message: str) -> None:
    returns = _returns(np.ones(DAYS), np.full(DAYS, 0.002))
    with pytest.raises(ConfigError, match=message):
        _events(returns, **keys)


def test_alert_value_reads_as_a_ratio() -> None:
    from monitor.alerts.units import threshold_text, value_text

    assert value_text("hedge", 1.3172) == "ratio +1.317"
    assert threshold_text("hedge", 1.25) == "1.25"
