"""Building the digest's context from plain data: alerts, events, returns, rules.

Pure apart from the engine calls: the pipeline reads the store and hands over rows and
frames; this module picks what the evening's digest shows and computes the numbers
beside each alert (value, band, drivers, history), the largest changes, the group
averages and the group matrices, as `monitor.digest.context`'s dataclasses. Rendering is
`monitor.digest.render`'s job.
"""

from __future__ import annotations

import datetime as dt
import math
from bisect import bisect_left, bisect_right
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from monitor import __version__
from monitor.digest.context import (
    AlertHistory,
    AlertView,
    CrossMatrixView,
    DataIssueView,
    DigestContext,
    DigestParameters,
    DriverView,
    GroupAverageView,
    HeatmapView,
    Instrument,
    MoverView,
    _finite,
)
from monitor.digest.facts import AlertFacts
from monitor.digest.feed import FeedFacts, build_feed
from monitor.digest.order import alert_sort_key
from monitor.engine import matrix_on_pair_dates, parse_measure, stream_on_pair_dates
from monitor.engine.drivers import measure_drivers
from monitor.engine.group_average import group_average
from monitor.engine.strength import describe
from monitor.pages.paths import alert_anchor, pair_page_path, target_page_path
from monitor.rules import Rule
from monitor.rules.targets import GroupTargets, PairTargets, pair_symbols
from monitor.templating import SCREENFUL

MOVERS_SHOWN = 10
MOVERS_SLICE = 500_000
"""Pairs compared at a time for the largest changes (bounds the memory of a large desk)."""


@dataclass(frozen=True)
class DigestInputs:
    """Everything the digest needs, read from the store by the pipeline."""

    desk: str
    as_of: dt.date
    generated_at: dt.datetime
    returns: pd.DataFrame
    """Returns through the digest's day, dates x symbols (the universe's order)."""
    names: Mapping[str, str]
    groups: Mapping[str, Sequence[str]]
    rules: Mapping[str, Rule]
    alerts: Sequence[AlertFacts]
    monitored_pairs: np.ndarray
    """(P, 2) column indices of the pairs the rules watch (the movers' candidates)."""
    measures: Sequence[str]
    return_kind: str
    horizon: int
    level: float
    largest_changes_days: int
    group_average_days: int
    history_days: int
    data_issues: Sequence[DataIssueView] = ()
    attention: str = ""
    data_through: dt.date | None = None
    pages_url: str = ""
    """`[pages] base_url` ending in "/": each alert then links to its page there."""
    cards: int = SCREENFUL
    """New alerts shown in full, with their chart and drivers (the strongest first)."""
    feed: FeedFacts | None = None
    """Facts of the Data feed block; None leaves the block out."""
    run_dates: Sequence[dt.date] = ()
    """Run dates of the schedule up to `as_of`, for "N business days" in the block."""


def _instrument(symbol: str, names: Mapping[str, str]) -> Instrument:
    return Instrument(symbol=symbol, name=names.get(symbol, ""))


def _finite_or_none(value: float | None) -> float | None:
    return float(value) if _finite(value) else None


def _rule_levels(rule: Rule) -> tuple[float | None, float | None, str]:
    threshold = getattr(rule, "threshold", None)
    if threshold is not None:
        return float(threshold.level), float(threshold.clear_level), str(threshold.side)
    if rule.kind == "shift":
        return float(getattr(rule, "z_level", math.nan)), float(getattr(rule, "clear_z", 0)), ""
    if rule.kind == "jump":
        return float(getattr(rule, "delta", math.nan)), None, ""
    return None, None, ""


def build_context(inputs: DigestInputs) -> DigestContext:
    """The digest for `inputs.as_of` (its day is the last business day on or before it)."""
    returns = inputs.returns
    matrix = returns.to_numpy(dtype=np.float64)
    symbols = [str(c) for c in returns.columns]
    column = {s: k for k, s in enumerate(symbols)}
    dates = [d.date() for d in returns.index]
    t = len(dates) - 1
    day = dates[t] if dates else inputs.as_of
    first_history = max(0, t - inputs.history_days + 1)
    chosen: list[tuple[AlertFacts, str, Rule | None]] = []
    data_alerts: list[tuple[str, AlertFacts]] = []
    feed_rule = inputs.feed.feed_rule if inputs.feed is not None else None
    for facts in inputs.alerts:
        if not facts.announced:
            continue
        if inputs.feed is not None and (facts.rule == feed_rule or facts.rule_kind == "stale"):
            # About the data, not a correlation: listed in the Data feed block instead.
            if facts.state == "cleared" and facts.cleared_on in (day, inputs.as_of):
                data_alerts.append(("cleared", facts))
            elif facts.state == "open":
                new = facts.opened_on in (day, inputs.as_of)
                data_alerts.append(("new" if new else "open", facts))
            continue
        if facts.state == "cleared" and facts.cleared_on in (day, inputs.as_of):
            # Cleared this evening: listed as cleared, never as new, even when it opened
            # (and was acknowledged) the same day.
            bucket = "cleared"
        elif facts.opened_on in (day, inputs.as_of) and facts.state != "retracted":
            bucket = "new"
        elif facts.state == "open" and facts.acknowledged_by:
            bucket = "acknowledged"
        elif facts.state == "open":
            bucket = "continuing"
        else:
            continue
        chosen.append((facts, bucket, inputs.rules.get(facts.rule)))
    # One engine call per measure for the day's value of every pair alert (a flood is
    # thousands of pairs); the history and drivers only for the cards shown in full.
    today = _pair_values(matrix, column, [(f, r) for f, _, r in chosen], t, inputs.level)
    views: dict[str, list[AlertView]] = {"new": [], "continuing": [], "acknowledged": [],
                                         "cleared": []}
    for facts, bucket, rule in chosen:
        views[bucket].append(_alert_view(facts, bucket, rule, inputs, matrix, column, dates, t,
                                         day, today.get(facts.id)))
    views["new"] = _with_histories(views["new"], inputs, matrix, column, dates, t,
                                   first_history)
    movers = _movers(inputs, matrix, symbols, t)
    group_averages, heatmaps = _groups(inputs, matrix, column, dates, t)
    counts = [_typical_count(m) for m in inputs.measures]
    params = DigestParameters(
        measures=tuple(inputs.measures), observations=tuple(counts),
        return_kind=inputs.return_kind,  # type: ignore[arg-type]
        horizon_days=inputs.horizon, confidence_level=inputs.level,
        largest_changes_days=inputs.largest_changes_days,
        group_average_days=inputs.group_average_days,
    )
    return DigestContext(
        desk=inputs.desk, as_of=day, data_through=inputs.data_through or day,
        generated_at=inputs.generated_at, parameters=params, version=__version__,
        data_attention=bool(inputs.attention), attention_message=inputs.attention,
        new_alerts=tuple(views["new"]), continuing=tuple(views["continuing"]),
        acknowledged=tuple(views["acknowledged"]), cleared=tuple(views["cleared"]),
        movers=tuple(movers), group_averages=tuple(group_averages),
        data_quality=tuple(inputs.data_issues), heatmaps=tuple(heatmaps),
        cross_matrices=tuple(cross_matrices(inputs, matrix, column, t)),
        run_date=inputs.as_of,
        data_feed=None if inputs.feed is None else build_feed(
            inputs.as_of, inputs.feed, data_alerts, inputs.names, inputs.run_dates,
            inputs.generated_at),
        pages_url=inputs.pages_url,
    )


def _typical_count(measure: str) -> float:
    spec = parse_measure(measure)
    if spec.window:
        return float(spec.window)
    lam = float(spec.lam or 0.0)
    return (1 + lam) / (1 - lam)  # Kish's limit for EWMA weights (REFERENCES.md)


def _primary(rule: Rule | None) -> str:
    return rule.measures()[0] if rule is not None and rule.measures() else ""


def _pair_columns(facts: AlertFacts, column: Mapping[str, int]) -> tuple[int, int] | None:
    pair = pair_symbols(facts.target, column)
    if pair is not None and pair[0] in column and pair[1] in column:
        return column[pair[0]], column[pair[1]]
    return None


Today = tuple[float, float, float, float]
"""A pair's value, band low, band high and observations on the digest's day."""


def _pair_values(matrix: np.ndarray, column: Mapping[str, int],
                 alerts: Sequence[tuple[AlertFacts, Rule | None]], t: int, level: float
                 ) -> dict[int, Today]:
    """The day's value, band and count of every pair alert, one engine call per measure."""
    by_measure: dict[str, list[tuple[int, tuple[int, int]]]] = {}
    for facts, rule in alerts:
        cols = _pair_columns(facts, column)
        measure = _primary(rule)
        if cols is not None and measure and t >= 0:
            by_measure.setdefault(measure, []).append((facts.id, cols))
    out: dict[int, Today] = {}
    for measure, items in by_measure.items():
        pairs = np.array([cols for _, cols in items], dtype=np.int64).reshape(-1, 2)
        result = next(stream_on_pair_dates(matrix, measure, pairs, start=t, stop=t + 1,
                                           level=level))
        low, high = result.band
        for k, (alert_id, _) in enumerate(items):
            out[alert_id] = (float(result.value[k]), float(low[k]), float(high[k]),
                             float(result.n[k]))
    return out


def _with_histories(alerts: Sequence[AlertView], inputs: DigestInputs, matrix: np.ndarray,
                    column: Mapping[str, int], dates: list[dt.date], t: int,
                    first_history: int) -> list[AlertView]:
    """The new alerts, the `inputs.cards` strongest (the cards shown in full) with their
    history chart and drivers; the others, summarised by the digest, without."""
    ranked = sorted(alerts, key=alert_sort_key)
    shown = [a for a in ranked[:inputs.cards]
             if a.b.symbol and a.a.symbol in column and a.b.symbol in column and t >= 0]
    by_measure: dict[str, list[AlertView]] = {}
    for alert in shown:
        primary = _primary(inputs.rules.get(alert.rule_name))
        if primary:
            by_measure.setdefault(primary, []).append(alert)
    filled: dict[int | str, AlertView] = {}
    for measure, group in by_measure.items():
        pairs = np.array([[column[a.a.symbol], column[a.b.symbol]] for a in group],
                         dtype=np.int64)
        days = list(stream_on_pair_dates(matrix, measure, pairs, start=first_history,
                                         stop=t + 1, level=inputs.level))
        values = np.array([d.value for d in days]).reshape(len(days), len(group))
        lows = np.array([d.low for d in days]).reshape(len(days), len(group))
        highs = np.array([d.high for d in days]).reshape(len(days), len(group))
        for k, alert in enumerate(group):
            ia, ib = int(pairs[k, 0]), int(pairs[k, 1])
            rows, contributions = measure_drivers(matrix, ia, ib, t, measure).ranked()
            filled[alert.id] = replace(
                alert,
                history=AlertHistory(dates=dates[first_history:t + 1], values=values[:, k],
                                     band_low=lows[:, k], band_high=highs[:, k]),
                drivers=tuple(
                    DriverView(day=dates[int(r)], contribution=float(c),
                               return_a=float(matrix[int(r), ia]),
                               return_b=float(matrix[int(r), ib]))
                    for r, c in zip(rows, contributions, strict=True)),
                drivers_measure=measure,
            )
    return [filled.get(a.id, a) for a in alerts]


def _alert_view(facts: AlertFacts, bucket: str, rule: Rule | None, inputs: DigestInputs,
                matrix: np.ndarray, column: Mapping[str, int], dates: list[dt.date], t: int,
                day: dt.date, today: Today | None) -> AlertView:
    event = facts.event_today or {}
    level, clear_level, direction = (None, None, "") if rule is None else _rule_levels(rule)
    measure = rule.measure_label() if rule is not None else ""
    a_text, b_text = pair_symbols(facts.target, column) or (facts.target, "")
    a = _instrument(a_text, inputs.names)
    b = _instrument(b_text, inputs.names) if b_text else Instrument(symbol="", name="")
    if not b_text and isinstance(getattr(rule, "targets", None), GroupTargets):
        a = Instrument(symbol=a_text, name="group average")
    value = low = high = n = math.nan
    primary = _primary(rule)
    if today is not None:
        value, low, high, n = today
    elif isinstance(getattr(rule, "targets", None), GroupTargets) and primary and t >= 0:
        members = [column[s] for s in inputs.groups.get(a_text, ()) if s in column]
        if len(members) >= 2:
            last = list(matrix_on_pair_dates(matrix[:, members], primary, start=t,
                                             stop=t + 1, level=inputs.level))[-1]
            value = group_average(last.value, np.arange(len(members)), t).value
    elif event:
        value = float(event.get("value") or math.nan)
        low = float(event.get("low") or math.nan)
        high = float(event.get("high") or math.nan)
        n = float(event.get("n") or math.nan)
    held_from = facts.first_breach_on
    days_held = max(0, bisect_right(dates, day) - bisect_left(dates, held_from))
    z = event.get("z") if event else None
    p = event.get("p") if event else None
    baseline = event.get("reference") if event else None
    shown_state = {"new": "new", "continuing": "continuing", "acknowledged": "acknowledged",
                   "cleared": "cleared"}[bucket]
    return AlertView(
        id=facts.id, severity=facts.severity,  # type: ignore[arg-type]
        rule_name=facts.rule, rule_kind=facts.rule_kind, a=a, b=b, measure=measure,
        value=float(value), band_low=float(low), band_high=float(high), days_held=days_held,
        opened=facts.opened_on, state=shown_state, level=level, clear_level=clear_level,
        direction=direction,
        strength=describe(value) if math.isfinite(value) and b_text else "",
        p_value=_finite_or_none(p) if p is not None else None,
        z=_finite_or_none(z) if z is not None else None,
        baseline=_finite_or_none(baseline) if baseline is not None else None,
        acknowledged_by=facts.acknowledged_by, acknowledged_at=facts.acknowledged_at,
        acknowledgement_note=facts.acknowledged_note, cleared_on=facts.cleared_on,
        observations=_finite_or_none(n),
        reminder=facts.reminded_today,
        groups=_alert_groups(a_text, b_text, rule, inputs.groups),
        method_note=(rule.method_note() or "") if rule is not None else "",
        page=_page_of(facts, b_text, rule),
    )


def _page_of(facts: AlertFacts, b_text: str, rule: Rule | None) -> str:
    """Site-relative address of the alert's row on the history pages (page and anchor),
    the way `monitor.pages` names them; "" for an alert no page shows."""
    a_text = facts.target.partition("/")[0]
    if b_text:
        page = pair_page_path(a_text, b_text)
    elif facts.rule_kind == "group-average" or isinstance(getattr(rule, "targets", None),
                                                          GroupTargets):
        page = target_page_path("group", a_text)
    elif a_text:
        page = target_page_path("instrument", a_text)
    else:
        return ""
    return f"{page}#{alert_anchor(facts.id)}"


def _alert_groups(a_text: str, b_text: str, rule: Rule | None,
                  groups: Mapping[str, Sequence[str]]) -> tuple[str, ...]:
    """The desk's groups of an alert's target, in the desk's group order."""
    if not b_text and (a_text in groups or isinstance(getattr(rule, "targets", None),
                                                      GroupTargets)):
        return (a_text,) if a_text in groups else ()
    members = {a_text, b_text} - {""}
    return tuple(name for name, symbols in groups.items() if members & set(symbols))


def _movers(inputs: DigestInputs, matrix: np.ndarray, symbols: list[str], t: int
            ) -> list[MoverView]:
    pairs = np.asarray(inputs.monitored_pairs, dtype=np.int64).reshape(-1, 2)
    before_t = t - inputs.largest_changes_days
    if pairs.size == 0 or before_t < 0:
        return []
    measure = inputs.measures[0]
    # Only the two days compared, and the pairs a slice at a time: at 3,000 instruments
    # the 4.5 million pairs' arrays and the engine's working copies of them would add
    # about half a gigabyte at once. Each slice keeps its largest changes; the largest of
    # those are the largest of all.
    kept: list[tuple[int, float, float, float]] = []
    for first in range(0, len(pairs), MOVERS_SLICE):
        part = pairs[first:first + MOVERS_SLICE]
        before = next(stream_on_pair_dates(matrix, measure, part, start=before_t,
                                           stop=before_t + 1, level=inputs.level)).value
        now = next(stream_on_pair_dates(matrix, measure, part, start=t, stop=t + 1,
                                        level=inputs.level)).value
        with np.errstate(invalid="ignore"):
            change = np.abs(now - before)
        for k in _largest(np.where(np.isnan(change), -1.0, change), MOVERS_SHOWN).tolist():
            if not math.isnan(change[k]):
                kept.append((first + k, float(change[k]), float(now[k]), float(before[k])))
    kept.sort(key=lambda item: (-item[1], -item[0]))
    return [
        MoverView(a=_instrument(symbols[pairs[k, 0]], inputs.names),
                  b=_instrument(symbols[pairs[k, 1]], inputs.names), measure=measure,
                  value_now=value_now, value_before=value_before)
        for k, _, value_now, value_before in kept[:MOVERS_SHOWN]
    ]


def _largest(values: np.ndarray, count: int) -> np.ndarray:
    """Positions of the `count` largest values, largest first (ties: higher position
    first, as a reversed stable argsort), without sorting the whole array."""
    if values.size > count:
        top = np.argpartition(values, values.size - count)[values.size - count:]
    else:
        top = np.arange(values.size)
    return top[np.lexsort((-top, -values[top]))]


def _groups(inputs: DigestInputs, matrix: np.ndarray, column: Mapping[str, int],
            dates: list[dt.date], t: int) -> tuple[list[GroupAverageView], list[HeatmapView]]:
    group_averages: list[GroupAverageView] = []
    heatmaps: list[HeatmapView] = []
    if t < 0:
        return group_averages, heatmaps
    measure = inputs.measures[0]
    first = max(0, t - inputs.history_days + 1)
    for group, members in inputs.groups.items():
        cols = [column[s] for s in members if s in column]
        if len(cols) < 2:
            continue
        block = matrix[:, cols]
        days = list(matrix_on_pair_dates(block, measure, start=first, stop=t + 1,
                                         level=inputs.level))
        averages = []
        used = 0
        positions = np.arange(len(cols))
        for d in days:
            day_average = group_average(d.value, positions, d.t)
            averages.append(day_average.value)
            used = day_average.pairs_used
        history = np.array(averages, dtype=np.float64)
        before_index = len(days) - 1 - inputs.group_average_days
        group_averages.append(GroupAverageView(
            group=group, average_now=float(history[-1]),
            average_before=float(history[before_index]) if before_index >= 0 else math.nan,
            pairs_used=int(used), instruments=len(cols),
            history_dates=dates[first:t + 1], history_values=history,
        ))
        heatmaps.append(HeatmapView(group=group, symbols=[s for s in members if s in column],
                                    matrix=np.array(days[-1].value)))
    return group_averages, heatmaps


def cross_matrices(inputs: DigestInputs, matrix: np.ndarray, column: Mapping[str, int],
                   t: int) -> list[CrossMatrixView]:
    """The matrix across the two groups of every ``between`` rule, once per pair of groups.

    Rows are the first group's instruments, columns the second's, both in the desk's
    order; values are the first measure on day `t`. A group pair named by several rules
    is drawn once and lists them all.
    """
    wanted: dict[tuple[str, str], list[str]] = {}
    for rule in inputs.rules.values():
        targets = getattr(rule, "targets", None)
        if isinstance(targets, PairTargets) and targets.between is not None:
            wanted.setdefault(targets.between, []).append(rule.name)
    views: list[CrossMatrixView] = []
    if t < 0 or not wanted:
        return views
    measure = inputs.measures[0]
    for (left, right), rules in wanted.items():
        rows = [s for s in inputs.groups.get(left, ()) if s in column]
        columns = [s for s in inputs.groups.get(right, ()) if s in column]
        if not rows or not columns:
            continue
        symbols = list(dict.fromkeys(rows + columns))
        block = matrix[:, [column[s] for s in symbols]]
        position = {s: k for k, s in enumerate(symbols)}
        # Every row x column pair on its own dates, as the rules see it.
        grid = np.array([(position[a], position[b]) for a in rows for b in columns],
                        dtype=np.int64)
        same = grid[:, 0] == grid[:, 1]
        # A pair of an instrument with itself (one in both groups) is left out: NaN.
        safe = np.where(same[:, None], [[0, 1 if len(symbols) > 1 else 0]], grid)
        last = list(stream_on_pair_dates(block, measure, safe, start=t, stop=t + 1,
                                         level=inputs.level))[-1]
        values = np.where(same, np.nan, np.asarray(last.value, dtype=np.float64))
        values = values.reshape(len(rows), len(columns))
        views.append(CrossMatrixView(left=left, right=right, rows=rows, columns=columns,
                                     matrix=values, rules=rules))
    return views
