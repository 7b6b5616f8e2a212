"""Building the history site's context from plain data: alerts, events, acks, returns.

Pure apart from the engine calls: the pipeline reads the store and hands over rows and the
returns frame; this module decides which pages exist (one per pair with an alert or
declared in a rule by name, one per group or instrument target with an alert, one per
rule) and computes each page's measure histories and alert drivers. Rendering is
`monitor.pages.render`'s job.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from monitor import __version__
from monitor.engine import matrix_on_pair_dates, stream_on_pair_dates
from monitor.engine.drivers import measure_drivers
from monitor.engine.group_average import group_average
from monitor.pages.context import (
    AckView,
    AlertSpan,
    AlertSummary,
    DigestLink,
    DriverRow,
    DriversView,
    EventView,
    InstrumentView,
    MeasureHistory,
    MuteState,
    MuteView,
    PairPage,
    RulePage,
    RunView,
    SiteContext,
    SiteParameters,
    TargetKind,
    TargetPage,
)
from monitor.rules import Rule
from monitor.rules.targets import PairTargets, pair_symbols

DRIVERS_KEPT = 10


@dataclass(frozen=True)
class SiteInputs:
    """Everything the site needs, read from the store by the pipeline."""

    desk: str
    generated_at: dt.datetime
    returns: pd.DataFrame
    names: Mapping[str, str]
    groups: Mapping[str, Sequence[str]]
    rules: Sequence[Rule]
    rule_tables: Sequence[Mapping[str, Any]]
    alerts: Sequence[Any]  # storage.alerts.AlertRow
    events: Sequence[Mapping[str, Any]]
    acknowledgements: Sequence[Mapping[str, Any]]
    runs: Sequence[Any]  # storage.runs.RunRow
    digests: Sequence[DigestLink]
    measures: Sequence[str]
    return_kind: str
    level: float
    mutes: Sequence[Mapping[str, Any]] = ()  # storage.alerts.list_mutes rows
    watch: Sequence[str] = ()
    """Pairs "A/B" whose page always carries charts, alert or not (`[desk] watch`)."""
    charted_pairs: int = 250
    """Most pairs with charts besides the watch list (`[desk] charted_pairs`)."""


def _histories(matrix: np.ndarray, column: Mapping[str, int],
               split_of: Mapping[str, tuple[str, str]],
               requests: Mapping[str, Sequence[tuple[str, Sequence[float]]]],
               dates: list[dt.date], level: float) -> dict[str, list[MeasureHistory]]:
    """Each charted pair's measure histories, one engine call per measure for all pairs."""
    by_measure: dict[str, list[str]] = {}
    for label, wanted in requests.items():
        for measure, _ in wanted:
            by_measure.setdefault(measure, []).append(label)
    series: dict[tuple[str, str], tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
    for measure, labels in by_measure.items():
        pairs = np.array([[column[s] for s in split_of[label]] for label in labels],
                         dtype=np.int64)
        values = np.full((len(dates), len(labels)), np.nan)
        lows, highs = values.copy(), values.copy()
        for k, day in enumerate(stream_on_pair_dates(matrix, measure, pairs, level=level)):
            values[k], lows[k], highs[k] = day.value, day.low, day.high
        for j, label in enumerate(labels):
            series[(label, measure)] = (values[:, j], lows[:, j], highs[:, j])
    return {
        label: [MeasureHistory(measure=measure, dates=dates,
                               values=series[(label, measure)][0],
                               band_low=series[(label, measure)][1],
                               band_high=series[(label, measure)][2], levels=tuple(levels))
                for measure, levels in wanted]
        for label, wanted in requests.items()
    }


def _canonical_label(label: str, column: Mapping[str, int]) -> str:
    """A watched pair as the alerts name it ("A/B" in the desk's column order); "" when
    either symbol is not in the store."""
    split = pair_symbols(label, column)
    if split is None:
        return ""
    a, b = split
    if a not in column or b not in column or a == b:
        return ""
    return f"{a}/{b}" if column[a] < column[b] else f"{b}/{a}"


SEVERITY_ORDER = {"critical": 0, "warning": 1, "info": 2}


def _charted(labels: Sequence[str], by_target: Mapping[str, Sequence[Any]],
             watched: set[str], limit: int) -> set[str]:
    """The pairs whose pages carry charts: the watch list, then up to `limit` others,
    those with an open alert first (most severe, most recently opened), then by their
    latest alert."""
    def rank(label: str) -> tuple[Any, ...]:
        alerts = by_target.get(label, ())
        live = [a for a in alerts if a.state == "open"]
        severity = min((SEVERITY_ORDER.get(a.severity, 3) for a in live or alerts), default=3)
        latest = max((a.cleared_on or a.opened_on for a in alerts), default=dt.date.min)
        opened = max((a.opened_on for a in live), default=dt.date.min)
        return (0 if live else 1, severity, -opened.toordinal(), -latest.toordinal(), label)

    others = sorted((label for label in labels if label not in watched), key=rank)
    return watched | set(others[:max(0, limit)])


def _group_history(matrix: np.ndarray, cols: list[int], measure: str, dates: list[dt.date],
                   levels: Sequence[float]) -> MeasureHistory:
    positions = np.arange(len(cols))
    values = np.array([group_average(d.value, positions, d.t).value
                       for d in matrix_on_pair_dates(matrix[:, cols], measure)])
    nan = np.full(len(values), np.nan)
    return MeasureHistory(measure=f"group average, {measure}", dates=dates, values=values,
                          band_low=nan, band_high=nan.copy(), levels=tuple(levels))


def _levels(rule: Rule) -> list[float]:
    threshold = getattr(rule, "threshold", None)
    if threshold is None:
        return []
    return [float(threshold.level), float(threshold.clear_level)]


def _num(value: Any) -> float:
    return math.nan if value is None else float(value)


def _opt(value: Any) -> float | None:
    return None if value is None or (isinstance(value, float) and math.isnan(value)) else float(
        value)


def build_site_context(inputs: SiteInputs) -> SiteContext:
    returns = inputs.returns
    matrix = returns.to_numpy(dtype=np.float64)
    symbols = [str(c) for c in returns.columns]
    column = {s: k for k, s in enumerate(symbols)}
    dates = [d.date() for d in returns.index]
    group_of = {s: g for g, members in inputs.groups.items() for s in members}
    rules = {rule.name: rule for rule in inputs.rules}
    events_by_alert: dict[int, list[Mapping[str, Any]]] = {}
    for event in inputs.events:
        events_by_alert.setdefault(int(event["alert_id"]), []).append(event)
    acks_by_alert: dict[int, list[Mapping[str, Any]]] = {}
    for ack in inputs.acknowledgements:
        acks_by_alert.setdefault(int(ack["alert_id"]), []).append(ack)

    summaries = []
    by_target: dict[str, list[Any]] = {}
    for alert in inputs.alerts:
        rule = rules.get(alert.rule)
        kind: TargetKind
        target: tuple[str, ...]
        pair = pair_symbols(alert.target, column)
        if pair is not None:
            kind, target = "pair", pair
        elif alert.rule_kind == "group-average":
            kind, target = "group", (alert.target,)
        else:
            kind, target = "instrument", (alert.target,)
        groups = tuple(dict.fromkeys(
            [group_of[s] for s in target if s in group_of] if kind != "group" else [alert.target]))
        summaries.append(AlertSummary(
            id=alert.id, state=alert.state, severity=alert.severity, rule_name=alert.rule,
            rule_kind=alert.rule_kind, target_kind=kind, target=target,
            opened=alert.opened_on, cleared=alert.cleared_on, peak=_num(alert.peak_value),
            acknowledged_by=alert.acknowledged_by, groups=groups,
            measure=rule.measure_label() if rule is not None else "",
            p_value=_opening_p(events_by_alert.get(int(alert.id), ())),
            excess=_excess(alert.opened_value, alert.level),
        ))
        by_target.setdefault(alert.target, []).append(alert)

    watched_labels = [_canonical_label(label, column) for label in inputs.watch]
    pair_labels = list(dict.fromkeys(
        [label for label in watched_labels if label]
        + [a.target for a in inputs.alerts if pair_symbols(a.target, column) is not None]
        + [label for rule in inputs.rules if isinstance(rule.targets, PairTargets)
           and _declared_pairs(inputs.rule_tables, rule.name)
           for label in rule.targets.labels]))
    split_of: dict[str, tuple[str, str]] = {}
    for label in pair_labels:
        split = pair_symbols(label, column)
        if split is not None and split[0] in column and split[1] in column:
            split_of[label] = split
    pair_labels = [label for label in pair_labels if label in split_of]
    charted = _charted(pair_labels, by_target, set(filter(None, watched_labels)),
                       inputs.charted_pairs)
    declared = [rule for rule in inputs.rules if isinstance(rule.targets, PairTargets)]
    requests: dict[str, list[tuple[str, list[float]]]] = {}
    for label in pair_labels:
        if label not in charted:
            continue
        alerts = by_target.get(label, [])
        watching = [rules[r.rule] for r in alerts if r.rule in rules]
        watching += [rule for rule in declared if label in rule.targets.labels]
        measure_levels: dict[str, list[float]] = {m: [] for m in inputs.measures}
        for rule in watching:
            for text in rule.measures():
                measure_levels.setdefault(text, [])
                for level in _levels(rule):
                    if level not in measure_levels[text]:
                        measure_levels[text].append(level)
        requests[label] = list(measure_levels.items())
    histories = _histories(matrix, column, split_of, requests, dates, inputs.level)
    uncharted_note = (
        f"Charts are drawn for the watch list and the {inputs.charted_pairs:,} pairs with the "
        "most pressing alerts ([desk] watch, charted_pairs); this pair's alerts and events are "
        "listed below. `comove series` prints its history.")
    pairs = []
    for label in pair_labels:
        a, b = split_of[label]
        alerts = by_target.get(label, [])
        cols = [column[a], column[b]]
        shown = label in charted
        pairs.append(PairPage(
            a=InstrumentView(a, inputs.names.get(a, ""), group_of.get(a, "")),
            b=InstrumentView(b, inputs.names.get(b, ""), group_of.get(b, "")),
            measures=histories.get(label, []), spans=_spans(alerts, rules),
            events=_events(alerts, events_by_alert),
            acknowledgements=_acks(alerts, acks_by_alert),
            drivers=[_drivers(alert, matrix, cols, dates, rules) for alert in alerts]
            if shown else [],
            note="" if shown else uncharted_note,
        ))

    targets = []
    for label, alerts in by_target.items():
        if pair_symbols(label, column) is not None:
            continue
        is_group = alerts[0].rule_kind == "group-average"
        members = list(inputs.groups.get(label, ())) if is_group else []
        charts: list[MeasureHistory] = []
        if is_group:
            cols = [column[s] for s in members if s in column]
            rule = rules.get(alerts[0].rule)
            if rule is not None and len(cols) >= 2 and rule.measures():
                charts.append(_group_history(matrix, cols, rule.measures()[0], dates,
                                                _levels(rule)))
        targets.append(TargetPage(
            kind="group" if is_group else "instrument", label=label,
            name="" if is_group else inputs.names.get(label, ""), members=members,
            measures=charts, spans=_spans(alerts, rules),
            events=_events(alerts, events_by_alert),
            acknowledgements=_acks(alerts, acks_by_alert)))

    tables = {str(t.get("name")): t for t in inputs.rule_tables}
    rule_pages = [
        RulePage(name=rule.name, kind=rule.kind, severity=rule.severity,
                 measure=rule.measure_label(),
                 parameters=[(k, _text(v)) for k, v in tables.get(rule.name, {}).items()
                             if k not in ("name", "kind", "description", "severity", "measure")],
                 description=str(tables.get(rule.name, {}).get("description", rule.summary)),
                 method_note=rule.method_note() or "")
        for rule in inputs.rules
    ]
    runs = [
        RunView(id=r.id, kind=r.kind, as_of=r.as_of, status=r.status, started=r.started_at,
                range_start=r.range_start, finished=r.finished_at, duration_seconds=r.seconds,
                counts={k: v for k, v in r.counts.items() if isinstance(v, int)},
                error=r.error)
        for r in inputs.runs if r.kind in ("daily", "backfill")
    ]
    return SiteContext(
        desk=inputs.desk, generated_at=inputs.generated_at,
        data_through=dates[-1] if dates else inputs.generated_at.date(), version=__version__,
        parameters=SiteParameters(measures=tuple(inputs.measures),
                                  return_kind=inputs.return_kind,  # type: ignore[arg-type]
                                  confidence_level=inputs.level),
        alerts=summaries, pairs=pairs, rules=rule_pages, runs=runs, digests=inputs.digests,
        groups=dict(group_of), targets=targets,
        mutes=_mutes(inputs.mutes, inputs.generated_at.date()),
    )


def _mutes(rows: Sequence[Mapping[str, Any]], today: dt.date) -> list[MuteView]:
    def state(row: Mapping[str, Any]) -> MuteState:
        if row["until"] < today:
            return "ended"
        return "coming" if row["from_on"] > today else "active"

    return [MuteView(id=int(row["id"]), rule=row["rule"], target=row["target"],
                     from_on=row["from_on"], until=row["until"], reason=str(row["reason"]),
                     state=state(row))
            for row in sorted(rows, key=lambda r: int(r["id"]))]


def _opening_p(events: Sequence[Mapping[str, Any]]) -> float | None:
    """The p-value of an alert's opening event, the evidence the flood summary ranks by."""
    for event in events:
        if event.get("event") == "opened":
            return _opt(event.get("p"))
    return None


def _excess(value: Any, level: Any) -> float:
    """|value - level| of an opening, NaN when either is unknown."""
    if value is None or level is None:
        return math.nan
    return abs(float(value) - float(level))


def _declared_pairs(tables: Sequence[Mapping[str, Any]], name: str) -> bool:
    return any(t.get("name") == name and "pairs" in t for t in tables)


def _text(value: Any) -> str:
    if isinstance(value, list | tuple):
        return ", ".join(str(v) for v in value)
    return str(value)


def _spans(alerts: Sequence[Any], rules: Mapping[str, Rule]) -> list[AlertSpan]:
    out = []
    for a in alerts:
        if a.state == "retracted":
            continue
        rule = rules.get(a.rule)
        measure = rule.measures()[0] if rule is not None and rule.measures() else ""
        out.append(AlertSpan(alert_id=a.id, start=a.opened_on, end=a.cleared_on,
                             rule_name=a.rule, severity=a.severity, measure=measure))
    return out


def _events(alerts: Sequence[Any], by_alert: Mapping[int, Sequence[Mapping[str, Any]]]
            ) -> list[EventView]:
    out = []
    for a in alerts:
        for e in by_alert.get(a.id, ()):
            out.append(EventView(
                day=e["date"], alert_id=a.id, rule_name=a.rule, kind=e["event"],
                value=_num(e["value"]), level=_opt(e["level"]), band_low=_num(e["low"]),
                band_high=_num(e["high"]), p_value=_opt(e["p"]), observations=_opt(e["n"])))
        retracted_on = getattr(a, "retracted_on", None)
        if a.state == "retracted" and retracted_on is not None:
            out.append(EventView(day=retracted_on, alert_id=a.id, rule_name=a.rule,
                                 kind="retracted", value=math.nan,
                                 detail=getattr(a, "retracted_reason", None) or ""))
    return sorted(out, key=lambda e: (e.day, str(e.alert_id)))


def _acks(alerts: Sequence[Any], by_alert: Mapping[int, Sequence[Mapping[str, Any]]]
          ) -> list[AckView]:
    return [AckView(alert_id=a.id, by=k["by"], at=k["at"], note=k["note"] or "")
            for a in alerts for k in by_alert.get(a.id, ())]


def _drivers(alert: Any, matrix: np.ndarray, cols: list[int], dates: list[dt.date],
             rules: Mapping[str, Rule]) -> DriversView:
    rule = rules.get(alert.rule)
    if rule is None or not rule.measures() or alert.opened_on not in dates:
        return DriversView(alert_id=alert.id, day=alert.opened_on)
    measure = rule.measures()[0]
    t = dates.index(alert.opened_on)
    found = measure_drivers(matrix, cols[0], cols[1], t, measure)
    order = np.argsort(-np.abs(np.nan_to_num(found.contributions)), kind="stable")
    kept, rest = order[:DRIVERS_KEPT], order[DRIVERS_KEPT:]
    rows = [DriverRow(day=dates[int(found.days[k])], contribution=float(found.contributions[k]),
                      return_a=float(matrix[int(found.days[k]), cols[0]]),
                      return_b=float(matrix[int(found.days[k]), cols[1]]))
            for k in kept.tolist()]
    finite = found.contributions[rest][np.isfinite(found.contributions[rest])]
    return DriversView(alert_id=alert.id, day=alert.opened_on, rows=rows, measure=measure,
                       other_days=int(finite.size), other_sum=float(math.fsum(finite)),
                       total=found.value)
