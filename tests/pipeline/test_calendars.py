"""Instruments on different calendars: the rules see each pair on its own dates, exactly
the values `comove series` shows, and an alert the series plainly calls is opened.

The panel: two equities of one market (closed on its holidays, about every 30 business
days), a future that trades every weekday (so it has closes on the equities' holidays), and
an instrument of a second market with its own holidays. Before the fix the rules built
returns on the union of every instrument's dates: each equity holiday removed that day's
and the next day's return from the equity pair, a `rolling:63` window never held 63 of
them, the rule had no value and the alert never opened, while `series` (the pair's own two
columns) showed a value every day.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.pipeline import evaluate_range, ingest_file, init_store, series
from monitor.rules.inputs import DayInputs
from monitor.rules.level import LevelRule
from storage import Store
from storage import alerts as alerts_store
from tests.scenarios import INSTRUMENTS

SYMBOLS = ("KLV", "DUNQ", "TEZ10", "VARO")
PAIRS = [(a, b) for i, a in enumerate(SYMBOLS) for b in SYMBOLS[i + 1:]]
MEASURES = ("rolling:63", "ewma:hl=21", "rank:63")
BREAK_DAY = 330

DESK = INSTRUMENTS + """
[[instruments]]
symbol = "VARO"
name = "Varo Harbour Index"
group = "equities"

[[rules]]
name = "hedge-gap"
kind = "level"
measure = "rolling:63"
pairs = ["KLV/DUNQ"]
below = 0.90
clear = 0.93
""" + "".join(f"""
[[rules]]
name = "watch-{k}"
kind = "level"
measure = "{measure}"
all = true
above = 0.9999
""" for k, measure in enumerate(MEASURES))


def _closes() -> pd.DataFrame:
    """Seeded closes: KLV and DUNQ move together (about 0.95, then about 0.80 from
    BREAK_DAY on), Student t(4) shocks; holidays as in the module docstring."""
    rng = np.random.default_rng(2026)
    dates = pd.bdate_range("2021-01-04", periods=480, name="date")
    days = len(dates)
    shocks = rng.standard_t(4, size=(days, 4)) / np.sqrt(2.0)
    rho = np.where(np.arange(days) < BREAK_DAY, 0.95, 0.80)
    market = shocks[:, 0]
    klv = market
    dunq = rho * market + np.sqrt(1.0 - rho**2) * shocks[:, 1]
    tez = 0.2 * market + shocks[:, 2]
    varo = 0.5 * market + shocks[:, 3]
    returns = 0.01 * np.column_stack([klv, dunq, tez, varo])
    closes = pd.DataFrame(100.0 * np.exp(np.cumsum(returns, axis=0)), index=dates,
                          columns=list(SYMBOLS))
    equity_holidays = np.arange(17, days, 31)
    other_holidays = np.arange(9, days, 45)
    closes.iloc[equity_holidays, [0, 1]] = np.nan
    closes.iloc[other_holidays, 3] = np.nan
    closes.iloc[250:253, 3] = np.nan  # a three-day closure
    return closes


@pytest.fixture
def desk(store_url: str, write_settings: Callable[..., Settings],
         tmp_path: Path) -> Iterator[tuple[Store, Settings]]:
    path = tmp_path / "closes.csv"
    _closes().to_csv(path, date_format="%Y-%m-%d")
    settings = write_settings(store_url, DESK)
    store = init_store(settings)
    ingest_file(store, settings, path, today=dt.date(2023, 1, 2))
    yield store, settings
    store.dispose()


def _seen_by_rules(store: Store, settings: Settings,
                   monkeypatch: pytest.MonkeyPatch) -> dict[tuple[str, str], dict[dt.date, float]]:
    """Backfill, recording the value every `watch-*` rule read for each pair each day."""
    seen: dict[tuple[str, str], dict[dt.date, float]] = {}
    original = LevelRule.evaluate

    def spy(rule: LevelRule, day: DayInputs) -> Any:
        if rule.name.startswith("watch-"):
            values = day.measure(rule.measure, rule.targets.pairs).value
            for (i, j), value in zip(rule.targets.pairs, values, strict=True):
                key = (rule.measure, f"{SYMBOLS[i]}/{SYMBOLS[j]}")
                seen.setdefault(key, {})[day.date] = float(value)
        return original(rule, day)

    monkeypatch.setattr(LevelRule, "evaluate", spy)
    evaluate_range(store, settings, None, None)
    return seen


def test_series_equals_what_the_rules_saw_every_day_for_every_pair(
    desk: tuple[Store, Settings], monkeypatch: pytest.MonkeyPatch
) -> None:
    store, settings = desk
    seen = _seen_by_rules(store, settings, monkeypatch)
    assert len(seen) == len(MEASURES) * len(PAIRS)
    for measure in MEASURES:
        for a, b in PAIRS:
            rules = pd.Series(seen[(measure, f"{a}/{b}")])
            shown = series(store, settings, a, b, measure).set_index("date")["value"]
            # The rules run on every instrument's dates; on a date the pair has no close
            # on one side it keeps the value of its last own date, which is what `series`
            # shows for the last of its dates up to then.
            expected = shown.reindex(rules.index, method="ffill")
            assert rules.notna().sum() > 300, (measure, a, b)
            assert np.array_equal(rules.isna().to_numpy(), expected.isna().to_numpy()), (
                measure, a, b)
            np.testing.assert_allclose(rules.to_numpy(), expected.to_numpy(), rtol=0,
                                       atol=1e-12, equal_nan=True, err_msg=f"{measure} {a}/{b}")
            # and on every date of the series, the same value
            common = shown.index.intersection(rules.index)
            assert len(common) == len(shown)


def test_the_alert_the_series_calls_is_opened(desk: tuple[Store, Settings]) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None, rule_names=["hedge-gap"])
    shown = series(store, settings, "KLV", "DUNQ", "rolling:63").set_index("date")["value"]
    assert shown.notna().sum() > 350  # a value on nearly every date, holidays or not
    below = shown[shown < 0.90]
    assert len(below), "the planted break must take the series below 0.90"
    with store.connect() as conn:
        alerts = alerts_store.list_alerts(conn, rule="hedge-gap")
    assert alerts, "the level rule must open on the day the series goes below 0.90"
    assert alerts[0].opened_on == below.index[0]
    assert alerts[0].target == "KLV/DUNQ"


def test_the_digest_notes_windows_that_lost_days_to_calendar_differences(
    desk: tuple[Store, Settings]
) -> None:
    from monitor.data.quality import calendar_losses
    from monitor.pipeline import digest_context

    store, settings = desk
    closes = _closes()
    last = closes.index[-1].date()
    context = digest_context(store, settings, last,
                             now=dt.datetime(2023, 1, 2, 18, tzinfo=dt.UTC))
    notes = {issue.symbol: issue for issue in context.data_quality if issue.kind == "calendar"}
    # the equity pair shares its calendar: nothing lost; the pairs across calendars lost
    # exactly the dates on which one side had a return and the other none
    assert "KLV/DUNQ" not in notes
    present = closes.notna().to_numpy()[1:]  # a return wherever there is a close (max_gap 5)
    for label, issue in notes.items():
        a, b = label.split("/")
        i, j = SYMBOLS.index(a), SYMBOLS.index(b)
        # reference: a plain walk back over the pair's last 63 common dates
        both = present[:, i] & present[:, j]
        rows = np.flatnonzero(both)[-63:]
        span = present[rows[0]:, [i, j]]
        expected = int((span[:, 0] != span[:, 1]).sum())
        assert f"spans {expected} day" in issue.detail, (label, issue.detail)
        assert "rolling:63" in issue.detail
    assert {"KLV/TEZ10", "DUNQ/TEZ10", "TEZ10/VARO"} <= set(notes)
    lost, _ = calendar_losses(np.where(present, 0.0, np.nan), np.array([[0, 1], [0, 2]]), 63)
    assert lost[0] == 0 and lost[1] > 0
