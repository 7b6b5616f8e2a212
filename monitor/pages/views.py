"""Derived views of the history pages: what each table row and chart block shows.

This module owns what is computed from the context for display and never stored in it:
an alert's row (its link, groups and search text), the key numbers and month-end rows
under each chart with the chart's description for screen readers, a pair or target page
ready to render, and the orders rows are shown in. It is pure: no Jinja, no disk.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date
from typing import Any
from urllib.parse import urlencode

import numpy as np

from monitor.pages import svg_charts
from monitor.pages.context import (
    EVENT_KINDS,
    SEVERITIES,
    AckView,
    AlertSpan,
    AlertSummary,
    DriversView,
    EventView,
    InstrumentView,
    MeasureHistory,
)
from monitor.pages.paths import pair_page_path, target_page_path
from monitor.templating import SCREENFUL, format_corr, format_date

MONTH_END_ROWS = 400
"""Most month-end rows printed under a chart (more than 33 years of history)."""


FLOOD_STRONGEST = 3
"""Alerts named in a busy day's summary line before "and N more"."""


@dataclass(frozen=True)
class AlertRow:
    """An alert with what the tables need beside it: its link, groups and search text."""

    alert: AlertSummary
    link: str
    groups: tuple[str, ...]
    search: str
    groups_json: str


@dataclass(frozen=True)
class MeasureBlock:
    """One chart of a page and its table of key numbers."""

    history: MeasureHistory
    chart_file: str
    width: int
    height: int
    alt: str
    days_with_value: int
    latest: tuple[date, float, float, float] | None
    lowest: tuple[date, float] | None
    highest: tuple[date, float] | None
    month_ends: tuple[tuple[date, float, float, float], ...]
    spans: tuple[AlertSpan, ...]


@dataclass(frozen=True)
class HistoryPageView:
    """A pair or target page, ready to render."""

    path: str
    kind: str
    title: str
    heading: str
    instruments: tuple[InstrumentView, ...]
    members: tuple[str, ...]
    note: str
    blocks: tuple[MeasureBlock, ...]
    alerts: tuple[AlertRow, ...]
    spans: tuple[AlertSpan, ...]
    events: tuple[EventView, ...]
    acknowledgements: tuple[AckView, ...]
    drivers: tuple[DriversView, ...]
    symbols: tuple[str, str] | None
    alert_ids: frozenset[str]


def id_order(alert_id: int | str) -> tuple[int, int, str]:
    """Sort key of an id: whole-number ids first, by value, then text ids, by text."""
    if isinstance(alert_id, int):
        return (0, alert_id, "")
    return (1, 0, str(alert_id))


def alert_order(alert: AlertSummary) -> tuple[Any, ...]:
    """Sort key of the alert tables: newest first, most severe first, then by id."""
    # Newest first; within a day most severe first, then by id for a stable order.
    return (-alert.opened.toordinal(), SEVERITIES.index(alert.severity), id_order(alert.id))


def measure_block(
    history: MeasureHistory, spans: Sequence[AlertSpan], chart_file: str, subject: str,
    confidence_level: float,
) -> tuple[MeasureBlock, svg_charts.HistoryChartRequest]:
    """One chart of a page: what to draw, its key numbers and its text description.

    Parameters
    ----------
    history : MeasureHistory
        The measure's days, values and band, shape (T,) each; NaN days are skipped in the
        latest / lowest / highest numbers and printed as "n/a" in the month-end rows.
    spans : sequence of AlertSpan
        The page's alert periods; those of this measure (or of every measure) are shaded.
    chart_file : str
        The chart's file name, beside the page.
    subject : str
        The pair's or target's label, in the chart's title and description.
    confidence_level : float
        Level of the band, named in the description.

    Returns
    -------
    block : MeasureBlock
        What the page shows around the chart (at most `MONTH_END_ROWS` month-end rows).
    request : svg_charts.HistoryChartRequest
        What to draw, left to the caller (charts are drawn together, maybe in processes).
    """
    mine = tuple(s for s in spans if s.measure in ("", history.measure))
    request = svg_charts.HistoryChartRequest.build(
        history.dates, history.values, history.band_low, history.band_high,
        spans=[svg_charts.ChartSpan(s.start, s.end) for s in mine],
        levels=history.levels, title=f"{subject}  {history.measure}",
    )
    values = history.values
    known = np.flatnonzero(np.isfinite(values))
    latest = lowest = highest = None
    if known.size:
        last = int(known[-1])
        latest = (history.dates[last], float(values[last]),
                  float(history.band_low[last]), float(history.band_high[last]))
        low_i = int(known[np.argmin(values[known])])
        high_i = int(known[np.argmax(values[known])])
        lowest = (history.dates[low_i], float(values[low_i]))
        highest = (history.dates[high_i], float(values[high_i]))
    month_ends: list[tuple[date, float, float, float]] = []
    for i, day in enumerate(history.dates):
        is_last = i + 1 == len(history.dates)
        if is_last or history.dates[i + 1].month != day.month:
            month_ends.append((day, float(values[i]), float(history.band_low[i]),
                               float(history.band_high[i])))
    month_ends = month_ends[-MONTH_END_ROWS:]
    percent = f"{100 * confidence_level:g} %"
    if latest is not None:
        summary = (
            f"latest value {format_corr(latest[1])} on {format_date(latest[0])} "
            f"({percent} band {format_corr(latest[2])} to {format_corr(latest[3])})"
        )
    else:
        summary = "no day with a value"
    period = (
        f"from {format_date(history.dates[0])} to {format_date(history.dates[-1])}"
        if history.dates else "with no days"
    )
    alt = (
        f"Chart of {history.measure} for {subject} {period}: {summary}; "
        f"{len(mine)} alert period{'s' if len(mine) != 1 else ''} shaded. "
        "The key numbers are in the table below the chart."
    )
    block = MeasureBlock(
        history=history, chart_file=chart_file, width=svg_charts.CHART_WIDTH,
        height=svg_charts.CHART_HEIGHT, alt=alt, days_with_value=int(known.size),
        latest=latest, lowest=lowest, highest=highest, month_ends=tuple(month_ends),
        spans=mine,
    )
    return block, request



@dataclass(frozen=True)
class FloodDay:
    """A day on which one rule opened more alerts than a screenful, summarised in a line.

    Attributes
    ----------
    rule_name : str
        The rule.
    day : date
        The day the alerts opened.
    count : int
        Alerts the rule opened that day (retracted ones included: the index lists them).
    strongest : tuple of AlertRow
        The `FLOOD_STRONGEST` with the strongest evidence (`evidence_order`).
    more : int
        The others ("and N more").
    link : str
        The alert index filtered to that rule and day, site-relative
        (``index.html#rule=...&opened=...``, read by site.js).
    """

    rule_name: str
    day: date
    count: int
    strongest: tuple[AlertRow, ...]
    more: int
    link: str


def evidence_order(alert: AlertSummary) -> tuple[Any, ...]:
    """Sort key putting the strongest evidence first, as the digest does
    (`monitor.digest.order.alert_sort_key`): severity, then the opening's p-value
    (smallest first), then how far past its level it opened (largest first), then id."""
    p = alert.p_value if alert.p_value is not None and math.isfinite(alert.p_value) \
        else math.inf
    excess = -alert.excess if math.isfinite(alert.excess) else math.inf
    return (SEVERITIES.index(alert.severity), p, excess, id_order(alert.id))


def index_filter(rule_name: str, day: date) -> str:
    """The alert index filtered to one rule and opening day, site-relative."""
    return "index.html#" + urlencode({"rule": rule_name, "opened": day.isoformat()})


def flood_days(rows: Sequence[AlertRow], *, limit: int = SCREENFUL) -> list[FloodDay]:
    """The (rule, day) pairs with more than `limit` alerts opened, newest day first.

    Parameters
    ----------
    rows : sequence of AlertRow
        Alert rows in any order.
    limit : int
        A day with this many alerts of one rule or fewer is not summarised.

    Returns
    -------
    list of FloodDay
        Newest day first, then most alerts first, then by rule name.
    """
    by_day: dict[tuple[str, date], list[AlertRow]] = {}
    for row in rows:
        by_day.setdefault((row.alert.rule_name, row.alert.opened), []).append(row)
    days = []
    for (rule, day), found in by_day.items():
        if len(found) <= limit:
            continue
        ranked = sorted(found, key=lambda r: evidence_order(r.alert))
        days.append(FloodDay(
            rule_name=rule, day=day, count=len(found),
            strongest=tuple(ranked[:FLOOD_STRONGEST]),
            more=len(found) - min(len(found), FLOOD_STRONGEST),
            link=index_filter(rule, day),
        ))
    return sorted(days, key=lambda f: (-f.day.toordinal(), -f.count, f.rule_name))


def event_order(event: EventView) -> tuple[Any, ...]:
    """Sort key of the event tables: by day, alert, then opened / continuing / cleared."""
    return (event.day, id_order(event.alert_id), EVENT_KINDS.index(event.kind))


def alert_link(alert: AlertSummary) -> str:
    """Site-relative path of the page of the alert's pair or target."""
    if alert.target_kind == "pair":
        return pair_page_path(alert.target[0], alert.target[1])
    return target_page_path(alert.target_kind, alert.target[0])


def alert_groups(alert: AlertSummary, groups: Mapping[str, str]) -> tuple[str, ...]:
    """Groups an alert is filtered by: its own, else its group target, else its symbols'."""
    if alert.groups:
        return tuple(alert.groups)
    if alert.target_kind == "group":
        return (alert.target[0],)
    found = [groups.get(symbol, "") for symbol in alert.target]
    return tuple(dict.fromkeys(g for g in found if g))


def alert_row(
    alert: AlertSummary, groups: Mapping[str, str], names: Mapping[str, str]
) -> AlertRow:
    """The row of one alert in the index and on its rule's and target's pages.

    Parameters
    ----------
    alert : AlertSummary
        The alert.
    groups : mapping of str to str
        Symbol -> group (`SiteContext.groups`).
    names : mapping of str to str
        Symbol or target label -> full name, searched too ("" entries are skipped).
    """
    found = alert_groups(alert, groups)
    words = [
        str(alert.id), alert.state, alert.severity, alert.rule_name, alert.rule_kind,
        alert.target_label, *alert.target, *found, alert.measure,
        # A pair is the same pair written either way round.
        "/".join(reversed(alert.target)) if alert.target_kind == "pair" else "",
        alert.acknowledged_by or "",
        *(names.get(item, "") for item in alert.target),
    ]
    return AlertRow(
        alert=alert, link=alert_link(alert), groups=found,
        search=" ".join(w for w in words if w).lower(),
        groups_json=json.dumps(list(found)),
    )


__all__ = [
    "FLOOD_STRONGEST",
    "MONTH_END_ROWS",
    "SCREENFUL",
    "AlertRow",
    "FloodDay",
    "HistoryPageView",
    "MeasureBlock",
    "alert_groups",
    "alert_link",
    "alert_order",
    "alert_row",
    "event_order",
    "evidence_order",
    "flood_days",
    "id_order",
    "index_filter",
    "measure_block",
]
