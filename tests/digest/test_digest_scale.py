"""The digest at scale: a flood of pair alerts is built with one engine call per measure.

`build_context` gives every alert the day's value, band and count from one vectorised
call over all alerted pairs, and computes the history chart and the drivers only for the
new alerts shown in full (the strongest `cards`), so a day with thousands of alerts costs
a few engine calls, not one per alert. The values are checked against the engine run on
each pair alone, and the correlations against pandas' rolling Pearson correlation.

All data is simulated (seeded numpy); symbols are made up.
"""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pandas as pd
import pytest

from monitor.digest import AlertFacts, DigestInputs, build_context
from monitor.digest.order import alert_sort_key
from monitor.engine import stream
from monitor.rules import build_rules
from monitor.templating import SCREENFUL

SYMBOLS = [f"QX{k:02d}" for k in range(24)]
LEVEL_TABLE = {"name": "crowding", "kind": "level", "measure": "rolling:21", "all": True,
               "above": 0.0}


def _returns(days: int = 120) -> pd.DataFrame:
    rng = np.random.default_rng(17)
    factor = rng.normal(0, 1, (days, 1))
    loadings = rng.uniform(0.2, 0.9, len(SYMBOLS))
    shocks = factor * loadings + rng.normal(0, 1, (days, len(SYMBOLS))) * np.sqrt(
        1 - loadings**2)
    index = pd.bdate_range(end=pd.Timestamp("2026-03-05"), periods=days)
    return pd.DataFrame(0.01 * shocks, index=index, columns=SYMBOLS)


def _inputs(cards: int = SCREENFUL) -> tuple[DigestInputs, pd.DataFrame]:
    returns = _returns()
    rules = build_rules([LEVEL_TABLE], symbols=SYMBOLS, groups={})
    day = returns.index[-1].date()
    labels = list(rules[0].targets.labels)
    facts = [
        AlertFacts(id=k + 1, rule="crowding", target=label, opened_on=day,
                   first_breach_on=day, state="open", cleared_on=None,
                   severity="warning", rule_kind="level", announced=True)
        for k, label in enumerate(labels)
    ]
    inputs = DigestInputs(
        desk="Made-up Desk", as_of=day, generated_at=datetime(2026, 3, 5, 18, tzinfo=UTC),
        returns=returns, names={}, groups={}, rules={"crowding": rules[0]}, alerts=facts,
        monitored_pairs=rules[0].targets.pairs, measures=["rolling:21"], return_kind="log",
        horizon=1, level=0.95, largest_changes_days=5,
        group_average_days=21, history_days=60, cards=cards,
    )
    return inputs, returns


@pytest.mark.parametrize("cards", [SCREENFUL, 3])
def test_only_the_cards_shown_get_a_history_and_drivers(cards: int) -> None:
    inputs, _ = _inputs(cards)
    assert len(inputs.alerts) == 276 > SCREENFUL  # 24 instruments: 276 pairs
    ctx = build_context(inputs)
    ranked = sorted(ctx.new_alerts, key=alert_sort_key)
    with_history = [a for a in ranked if a.history is not None]
    assert [a.id for a in with_history] == [a.id for a in ranked[:cards]]
    assert all(a.drivers for a in with_history)
    assert not any(a.drivers for a in ranked[cards:])
    for alert in with_history:
        assert alert.history is not None and len(alert.history.dates) == 60
        # The chart ends on the card's own value.
        assert alert.history.values[-1] == pytest.approx(alert.value, abs=1e-12)


def test_vectorised_values_equal_the_engine_on_each_pair_and_pandas() -> None:
    inputs, returns = _inputs()
    ctx = build_context(inputs)
    matrix = returns.to_numpy()
    column = {s: k for k, s in enumerate(SYMBOLS)}
    for alert in ctx.new_alerts[::17]:
        a, b = column[alert.a.symbol], column[alert.b.symbol]
        alone = list(stream(matrix[:, [a, b]], "rolling:21", pairs=np.array([[0, 1]]),
                            start=len(matrix) - 1))[-1]
        assert alert.value == pytest.approx(float(alone.value[0]), abs=1e-12)
        assert alert.band_low == pytest.approx(float(alone.low[0]), abs=1e-12)
        assert alert.band_high == pytest.approx(float(alone.high[0]), abs=1e-12)
        assert alert.observations == 21.0
        # Outside reference: pandas' rolling Pearson correlation over the same 21 rows.
        expected = returns[alert.a.symbol].rolling(21).corr(returns[alert.b.symbol]).iloc[-1]
        assert alert.value == pytest.approx(float(expected), abs=1e-9)
    chart = next(a for a in ctx.new_alerts if a.history is not None)
    assert chart.history is not None
    expected = returns[chart.a.symbol].rolling(21).corr(returns[chart.b.symbol]).iloc[-60:]
    np.testing.assert_allclose(chart.history.values, expected.to_numpy(), atol=1e-9)


def test_sorted_unique_equals_numpy_unique() -> None:
    from monitor.engine.layout import sorted_unique

    rng = np.random.default_rng(5)
    for size in (0, 1, 7, 10_000):
        values = rng.integers(-50, 50, size)
        # Outside reference: numpy's own np.unique.
        np.testing.assert_array_equal(sorted_unique(values), np.unique(values))


def test_largest_changes_are_the_top_ten_of_a_full_sort() -> None:
    from monitor.digest.build import _largest

    rng = np.random.default_rng(6)
    for size in (0, 4, 10, 11, 5_000):
        values = rng.integers(0, 30, size).astype(float)
        top = _largest(values, 10)
        assert len(top) == min(10, size)
        np.testing.assert_array_equal(values[top], np.sort(values)[::-1][:10])


def test_largest_changes_by_slices_equal_the_whole(monkeypatch: pytest.MonkeyPatch) -> None:
    from monitor.digest import build

    inputs, _ = _inputs()
    whole = build_context(inputs).movers
    monkeypatch.setattr(build, "MOVERS_SLICE", 7)  # 276 pairs in 40 slices
    sliced = build_context(inputs).movers
    assert len(whole) == 10
    # Same pairs in the same order; the values agree to rounding (a slice may take the
    # engine's pairwise path where the whole list takes the matrix path).
    assert [m.pair for m in sliced] == [m.pair for m in whole]
    for got, want in zip(sliced, whole, strict=True):
        assert got.value_now == pytest.approx(want.value_now, abs=1e-12)
        assert got.value_before == pytest.approx(want.value_before, abs=1e-12)


def test_calendar_losses_by_groups_and_slices_equal_the_direct_count(
    monkeypatch: pytest.MonkeyPatch
) -> None:
    from monitor.data import quality

    rng = np.random.default_rng(8)
    returns = rng.normal(0, 0.01, (80, 14))
    returns[rng.random((80, 14)) < 0.05] = np.nan  # scattered missing days
    returns[:, 10:] = returns[:, [0]] * np.array([1.0, 2.0, 3.0, 4.0])  # one calendar
    returns[:30, 13] = np.nan  # a late starter
    returns[:, 12] = np.nan  # no returns at all
    first_col, second_col = np.triu_indices(14, k=1)
    pairs = np.column_stack([first_col, second_col])
    present = ~np.isnan(returns)
    # The direct count on every pair at once (the definition in calendar_losses' docstring).
    expected = quality._window_losses(present, pairs, 21)
    monkeypatch.setattr(quality, "LOSSES_SLICE", 5)
    lost, first = quality.calendar_losses(returns, pairs, 21)
    np.testing.assert_array_equal(lost, expected[0])
    np.testing.assert_array_equal(first, expected[1])
    same = [k for k, (i, j) in enumerate(pairs.tolist()) if {i, j} <= {0, 10, 11}]
    assert len(same) == 3 and not lost[same].any() and (first[same] >= 0).all()
