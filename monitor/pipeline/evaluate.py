"""Evaluation over a date range: replay the rules on the stored returns and commit alerts in
chunks.
"""

from __future__ import annotations

import datetime as dt
import difflib
import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from monitor.alerts.book import AlertBook
from monitor.alerts.replay import (
    AckLookup,
    DayEvents,
    Mute,
    Plan,
    make_plan,
    replay,
    scope_hash,
)
from monitor.config import Settings
from monitor.data.quality import stale_inputs
from monitor.data.returns import closes_to_returns
from monitor.errors import ComoveError, ConfigError
from monitor.pipeline.lease import evaluation_lease
from monitor.pipeline.store import read_closes, universe
from monitor.rules import Rule, build_rules
from monitor.rules.targets import PairTargets
from storage import Store
from storage import alerts as alerts_store
from storage import closes as closes_store
from storage import runs as runs_store

LOG = logging.getLogger("comove.evaluate")


MANY_PAIRS = 1_000_000
"""A rule watching this many pairs or more is named in a warning when the rules load."""
_WARNED: set[tuple[str, int]] = set()


def build_plan(settings: Settings, symbols: Sequence[str],
               rule_names: Sequence[str] | None = None) -> Plan:
    """The rules of the settings (optionally a subset by name) over `symbols`."""
    rules = build_rules(
        list(settings.rule_tables), symbols=list(symbols), groups=settings.groups,
        default_measure=settings.correlation.default_measure,
        max_window=settings.correlation.max_window,
    )
    if rule_names:
        known = {rule.name for rule in rules}
        for name in rule_names:
            if name not in known:
                hint = difflib.get_close_matches(name, sorted(known), n=1)
                near = f"; did you mean '{hint[0]}'?" if hint else ""
                raise ConfigError(f"--rule: no rule named {name!r}{near}")
        rules = [rule for rule in rules if rule.name in set(rule_names)]
    for rule in rules:
        size = len(rule.targets)
        if isinstance(rule.targets, PairTargets) and size >= MANY_PAIRS and (
                (rule.name, size) not in _WARNED):
            _WARNED.add((rule.name, size))
            LOG.warning("rule %s watches %s pairs: a backfill takes minutes and gigabytes, "
                        "and the digest and pages summarise its alerts (name pairs, a "
                        "group or between two groups to watch fewer)", rule.name,
                        f"{len(rule.targets):,}")
    return make_plan(rules, symbols, level=settings.correlation.level)


def _check_history(plan: Plan, rows: int, dates: Sequence[dt.date], *, strict: bool) -> None:
    """A measure whose window is longer than the whole stored history shows nothing: a
    settings error for a backfill; for the evening run (history still growing) one warning
    line, so the other rules still run and the digest still goes out."""
    from monitor.engine import parse_measure

    for rule in plan.rules:
        for text in rule.measures():
            measure = parse_measure(text)
            needed = measure.window if measure.window is not None else measure.min_count
            if needed <= rows:
                continue
            message = (f"rule {rule.name!r}: measure {text} needs {needed} returns but the "
                       f"store holds {rows} (from {dates[0]} to {dates[-1]}); shorten the "
                       "window or ingest more history")
            if strict:
                raise ConfigError(message)
            LOG.warning("%s; it shows nothing until then", message)


def _scope(settings: Settings, plan: Plan) -> str:
    r = settings.returns
    tables = [t for t in settings.rule_tables if t.get("name") in set(plan.rule_names)]
    return scope_hash({
        "rules": tables, "symbols": plan.symbols, "level": plan.level,
        "returns": [r.kind, r.horizon, r.fill_limit, r.max_gap],
        "default_measure": settings.correlation.default_measure,
    })


@dataclass
class EvaluationReport:
    """What an evaluation over a range did."""

    run_id: int
    start: dt.date
    end: dt.date
    days: int = 0
    days_written: int = 0
    resumed_from: dt.date | None = None
    opened: int = 0
    cleared: int = 0
    reminders: int = 0
    status: str = "done"
    already_done: bool = False
    critical_opened: list[dt.date] = field(default_factory=list)

    def counts(self) -> dict[str, object]:
        return {"days": self.days, "days_written": self.days_written, "opened": self.opened,
                "cleared": self.cleared, "reminders": self.reminders,
                "resumed_from": self.resumed_from}


Progress = Callable[[int, int, dt.date], None]


@dataclass
class _Inputs:
    returns: pd.DataFrame
    dates: list[dt.date]
    without_close: np.ndarray
    unchanged: np.ndarray


def _inputs(store: Store, settings: Settings, symbols: Sequence[str], end: dt.date) -> _Inputs:
    panel = read_closes(store, symbols, None, end)
    r = settings.returns
    returns = closes_to_returns(panel, kind=r.kind, horizon=r.horizon,
                                fill_limit=r.fill_limit,
                                max_gap=r.max_gap)
    without, unchanged = stale_inputs(panel)
    rows = panel.index.get_indexer(returns.index)
    return _Inputs(returns, [d.date() for d in returns.index], without[rows], unchanged[rows])


def evaluate_range(store: Store, settings: Settings, start: dt.date | None,
                   end: dt.date | None, **options: Any) -> EvaluationReport:
    """Evaluate the rules on every business day from `start` to `end` and store the alerts
    (:func:`_evaluate_range` has the options). With ``[compute] engine = "dask"`` the
    cluster is reached before anything is written: an unreachable scheduler is an error
    with the store untouched, and the tiles of the pair rules run on it."""
    if settings.compute.engine != "dask":
        return _evaluate_range(store, settings, start, end, connected=None, **options)
    from monitor.pipeline import distributed

    with distributed.client(settings.compute) as connected:
        return _evaluate_range(store, settings, start, end, connected=connected, **options)


def _evaluate_range(
    store: Store,
    settings: Settings,
    start: dt.date | None,
    end: dt.date | None,
    *,
    connected: Any,
    rule_names: Sequence[str] | None = None,
    kind: str = "backfill",
    progress: Progress | None = None,
    now: Callable[[], dt.datetime] | None = None,
    commit_seconds: float = 1.0,
    commit_days: int = 60,
    force: bool = False,
    should_stop: Callable[[], bool] | None = None,
) -> EvaluationReport:
    """Evaluate the rules on every business day from `start` to `end` and store the alerts.

    Idempotent: the events of the days in the range are replaced by the replay's, keyed
    by (rule, target, opened date), so a rerun gives identical alerts and events and keeps
    every acknowledgement. Work is committed every `commit_days` days or `commit_seconds`
    (whichever comes first) together with the alert state, so an interrupted run keeps
    what it committed and a rerun resumes from there. A change to the closes on or before
    the saved state's date (a restatement, or history ingested later) makes the replay
    start again from the first day, and so does `force`. `should_stop` is asked after every
    day: when it answers yes, the days evaluated so far are committed and KeyboardInterrupt
    is raised at that safe point (the CLI's Ctrl-C), never inside a transaction.
    """
    clock = now or (lambda: dt.datetime.now(dt.UTC))
    symbols = universe(store, settings)
    plan = build_plan(settings, symbols, rule_names)
    scope = _scope(settings, plan)
    data = _inputs(store, settings, symbols, end or dt.date.max)
    dates = data.dates
    if not dates:
        raise ComoveError("no returns to evaluate: ingest closes first (comove ingest FILE)")
    _check_history(plan, len(dates), dates, strict=kind == "backfill")
    first = start or dates[0]
    last = min(end or dates[-1], dates[-1])
    if first > last:
        raise ComoveError(f"nothing to evaluate between {first} and {last}: the closes run "
                          f"from {dates[0]} to {dates[-1]}")
    first_t = int(np.searchsorted(np.array(dates, dtype="datetime64[D]"),
                                  np.datetime64(first, "D")))
    stop_t = int(np.searchsorted(np.array(dates, dtype="datetime64[D]"),
                                 np.datetime64(last, "D"), side="right"))
    with store.begin() as conn:
        saved = alerts_store.load_state(conn, scope)
        changed_from, watermark = closes_store.earliest_change_since(
            conn, saved.batch_watermark if saved else 0)
        ack_index = alerts_store.acknowledgement_index(conn)
        mutes = [Mute(m["rule"], m["target"], m["from_on"], m["until"])
                 for m in alerts_store.list_mutes(conn)]
        run_id = runs_store.start_run(conn, kind=kind, as_of=last, range_start=first,
                                      params_hash=scope, now=clock())
        retraction = _retraction(conn, saved, changed_from, force, kind, last, clock())
    book = AlertBook()
    from_t = 0
    report = EvaluationReport(run_id=run_id, start=first, end=last)
    if saved is not None and not force and (changed_from is None
                                            or changed_from > saved.last_date):
        # Resume where a previous run of the same scope stopped when that is before the
        # range's end; a range wholly before it is replayed from the first day.
        resume_t = int(np.searchsorted(np.array(dates, dtype="datetime64[D]"),
                                       np.datetime64(saved.last_date, "D"), side="right"))
        if 0 < resume_t <= stop_t:
            book = AlertBook.restore(saved.snapshot)
            from_t = resume_t
            report.resumed_from = saved.last_date
            report.already_done = resume_t == stop_t
    write_from = max(first_t, from_t)
    if from_t >= stop_t:
        with store.begin() as conn:
            runs_store.finish_run(conn, run_id, status="done", now=clock(),
                                  counts=report.counts())
        return report
    acked = _ack_lookup(book, ack_index)
    pending: list[DayEvents] = []
    last_commit = time.monotonic()
    total = stop_t - write_from
    returns = data.returns.to_numpy()
    try:
        remote = None
        if connected is not None:
            from monitor.pipeline import distributed

            remote = distributed.remote_conditions(
                connected, returns, dates, plan, book, settings.compute, from_t=from_t,
                stop_t=stop_t, progress=_tile_progress())
        for day in replay(
            returns, dates, plan, book, from_t=from_t, stop_t=stop_t,
            days_without_close=data.without_close, days_unchanged=data.unchanged,
            mutes=mutes, acknowledged=acked, remote=remote,
        ):
            report.days += 1
            if day.t < write_from:
                continue
            pending.append(day)
            stopping = should_stop is not None and should_stop()
            if (stopping or len(pending) >= commit_days or day.t == stop_t - 1
                    or time.monotonic() - last_commit >= commit_seconds):
                _commit_days(store, plan, scope, book, pending, watermark, report, clock(),
                             retraction)
                pending = []
                last_commit = time.monotonic()
                if progress is not None:
                    progress(report.days_written, total, day.date)
            if stopping:
                raise KeyboardInterrupt
    except KeyboardInterrupt:
        report.status = "interrupted"
        with store.begin() as conn:
            runs_store.finish_run(conn, run_id, status="interrupted", now=clock(),
                                  counts=report.counts())
        raise
    except Exception as exc:
        report.status = "failed"
        with store.begin() as conn:
            runs_store.finish_run(conn, run_id, status="failed", now=clock(),
                                  counts=report.counts(), error=f"{type(exc).__name__}: {exc}")
        raise
    with store.begin() as conn:
        runs_store.finish_run(conn, run_id, status="done", now=clock(), counts=report.counts())
    return report


def _tile_progress() -> Callable[[int, int], None]:
    """Log tiles done / total about every tenth of the way (and the last)."""

    def log(done: int, total: int) -> None:
        step = max(1, total // 10)
        if done % step == 0 or done == total:
            LOG.info("tiles %d/%d", done, total)

    return log


def _ack_lookup(book: AlertBook,
                index: dict[tuple[str, str, dt.date], dt.date]) -> AckLookup | None:
    if not index:
        return None
    by_rule: dict[str, dict[str, list[tuple[dt.date, dt.date]]]] = {}
    for (rule, target, opened), effective in index.items():
        by_rule.setdefault(rule, {}).setdefault(target, []).append((opened, effective))

    def lookup(rule: Rule, date: dt.date) -> np.ndarray | None:
        targets = by_rule.get(rule.name)
        if not targets:
            return None
        mask = np.zeros(len(rule.targets), dtype=bool)
        for alert in book.open_alerts(rule):
            for opened, effective in targets.get(alert.key.target, ()):
                if opened == alert.key.opened and effective <= date:
                    mask[alert.index] = True
        return mask

    return lookup


def _retraction(conn: Any, saved: alerts_store.SavedState | None, changed_from: dt.date | None,
                force: bool, kind: str, last: dt.date, now: dt.datetime
                ) -> alerts_store.Retraction:
    """Why this replay may no longer produce an alert it produced before, recorded on each
    alert it retracts. The day is the run's as-of date for the daily run, else the later
    of the range's end and today (so the next evening's digest lists it)."""
    on = last if kind == "evaluation" else max(last, now.date())
    if saved is not None and changed_from is not None and changed_from <= saved.last_date:
        batch = closes_store.first_changing_batch(conn, saved.batch_watermark, saved.last_date)
        if batch is not None:
            return alerts_store.Retraction(
                on=on, batch=batch[0],
                reason=f"closes from {changed_from} on were restated or added late (ingest "
                       f"batch {batch[0]}, {Path(batch[1]).name}); the rerun no longer "
                       "produces the alert")
    if force:
        return alerts_store.Retraction(on=on, reason="a forced rerun over the same days no "
                                                     "longer produces the alert")
    if saved is None:
        return alerts_store.Retraction(on=on, reason="a rerun after the rules, instruments or "
                                                     "return settings changed no longer "
                                                     "produces the alert")
    return alerts_store.Retraction(on=on, reason="a rerun over the same days no longer "
                                                 "produces the alert")


def _commit_days(store: Store, plan: Plan, scope: str, book: AlertBook, days: list[DayEvents],
                 watermark: int, report: EvaluationReport, now: dt.datetime,
                 retraction: alerts_store.Retraction | None = None) -> None:
    rules = list(plan.rule_names)
    with store.begin() as conn:
        touched = alerts_store.delete_events_between(conn, rules, days[0].date, days[-1].date)
        measures = {rule.name: rule.measure_label() for rule in plan.rules}
        touched |= alerts_store.write_events(
            conn, [e for day in days for e in day.events], measures)
        for day in days:
            for event in day.events:
                if event.event == "opened":
                    report.opened += 1
                    if event.severity == "critical":
                        report.critical_opened.append(event.date)
                elif event.event == "cleared":
                    report.cleared += 1
                else:
                    report.reminders += 1
        alerts_store.refresh_states(conn, touched, retraction)
        last = days[-1].date
        alerts_store.update_open_alerts(conn, [
            (alert.key.rule, alert.key.target, alert.key.opened, alert.peak_value,
             alert.peak_date, alert.last_value, last)
            for rule in plan.rules for alert in book.open_alerts(rule)])
        alerts_store.save_state(
            conn, alerts_store.SavedState(scope, last, watermark, book.snapshot()), now)
    report.days_written += len(days)


def backfill(store: Store, settings: Settings, start: dt.date | None, end: dt.date | None,
             **options: Any) -> EvaluationReport:
    """`evaluate_range` under the evaluation lease, so it never overlaps a daily run."""
    with evaluation_lease(store):
        with store.begin() as conn:
            runs_store.close_unfinished(conn, now=dt.datetime.now(dt.UTC))
        return evaluate_range(store, settings, start, end, **options)
