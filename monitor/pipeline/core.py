"""The only module that wires the store to the computation.

The CLI and the scheduler call these functions; each opens what it needs from the store,
hands plain frames and arrays to the pure modules and writes the results back.
"""

from __future__ import annotations

import datetime as dt
import difflib
import math
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

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
    stale_inputs,
)
from monitor.config import Settings
from monitor.data.parse import FileFormat, find_suspects, parse_closes, read_bytes
from monitor.data.returns import closes_to_returns
from monitor.engine import parse_measure, stream
from monitor.errors import ComoveError, ConfigError, IngestError
from monitor.rules import Rule, build_rules
from storage import Store, open_store
from storage import alerts as alerts_store
from storage import closes as closes_store
from storage import outbox as outbox_store
from storage import runs as runs_store

NEIGHBOUR_DAYS = 31
"""Calendar days either side of a file's dates read back to judge suspect moves."""


def desk_today(settings: Settings, now: dt.datetime | None = None) -> dt.date:
    """Today's date in the desk's time zone."""
    moment = now or dt.datetime.now(dt.UTC)
    return moment.astimezone(ZoneInfo(settings.desk.timezone)).date()


def open_settings_store(settings: Settings, *, create: bool = False) -> Store:
    store = open_store(settings.store_url, create=create)
    if create:
        with store.begin() as conn:
            closes_store.sync_instruments(conn, _instrument_rows(settings))
    return store


def _instrument_rows(settings: Settings) -> list[closes_store.InstrumentRow]:
    return [
        closes_store.InstrumentRow(i.symbol, i.name, i.group, i.currency, i.calendar)
        for i in settings.instruments
    ]


def init_store(settings: Settings) -> Store:
    """Create the store's tables (idempotent), record the configured instruments, make the inbox."""
    store = open_settings_store(settings, create=True)
    settings.inbox.mkdir(parents=True, exist_ok=True)
    return store


@dataclass
class IngestReport:
    """What ingesting one file did."""

    file: str
    rows_read: int
    rows_accepted: int
    rows_rejected: int
    batch_id: int | None = None
    closes_new: int = 0
    closes_restated: int = 0
    closes_unchanged: int = 0
    earliest_restated: dt.date | None = None
    already_ingested: bool = False
    restatements: pd.DataFrame = field(default_factory=pd.DataFrame)
    suspects: pd.DataFrame = field(default_factory=pd.DataFrame)
    problems: list[str] = field(default_factory=list)


def ingest_file(
    store: Store,
    settings: Settings,
    path: Path,
    *,
    layout: FileFormat = "auto",
    skip_bad: bool = False,
    today: dt.date | None = None,
    now: dt.datetime | None = None,
) -> IngestReport:
    """Validate one closes file and write it in one transaction.

    All-or-nothing by default: with any bad row nothing is written and IngestError lists
    every problem (a rejected batch is still recorded for the audit trail). With
    `skip_bad` the good rows are written and the rejects recorded in the batch.
    """
    now = now or dt.datetime.now(dt.UTC)
    today = today or desk_today(settings, now)
    strict = bool(settings.instruments) and not settings.sources.allow_new_symbols
    parsed = parse_closes(
        path.name, read_bytes(path), today=today,
        known_symbols=settings.symbols if strict else None, layout=layout,
        today_zone=settings.desk.timezone,
    )
    accepted = len(parsed.rows)
    if parsed.problems and not skip_bad:
        with store.begin() as conn:
            closes_store.insert_batch(
                conn, file_name=str(path), sha256=parsed.sha256, rows_read=parsed.rows_read,
                rows_accepted=0, rows_rejected=parsed.rows_rejected, status="rejected",
                problems=parsed.problems, now=now,
            )
        raise IngestError(
            f"{path.name}: {len(parsed.problems)} bad value(s) on {parsed.rows_rejected} "
            "line(s); nothing from the file was written (--skip-bad writes the good rows)",
            parsed.problems,
        )
    report = IngestReport(file=str(path), rows_read=parsed.rows_read, rows_accepted=accepted,
                          rows_rejected=parsed.rows_rejected, problems=parsed.problems)
    rows = parsed.rows
    with store.begin() as conn:
        previous = closes_store.batch_for_sha(conn, parsed.sha256)
        if previous is not None and not parsed.problems:
            report.already_ingested = True
            report.batch_id = previous
            report.closes_unchanged = accepted
            return report
        closes_store.sync_instruments(conn, _instrument_rows(settings))
        closes_store.ensure_symbols(conn, rows["symbol"].unique().tolist())
        if rows.empty:
            existing = rows[["symbol", "date", "close"]]
        else:
            margin = dt.timedelta(days=NEIGHBOUR_DAYS)
            existing = closes_store.read_closes_long(
                conn, sorted(rows["symbol"].unique().tolist()),
                rows["date"].min().date() - margin, rows["date"].max().date() + margin,
            )
        fresh, restated = closes_store.diff_closes(existing, rows)
        suspects = find_suspects(existing, rows, settings.returns.suspect_move)
        batch_id = closes_store.insert_batch(
            conn, file_name=str(path), sha256=parsed.sha256, rows_read=parsed.rows_read,
            rows_accepted=accepted, rows_rejected=parsed.rows_rejected,
            status="partial" if parsed.problems else "accepted", problems=parsed.problems,
            now=now,
        )
        closes_store.write_closes(conn, batch_id, str(path), fresh, restated, suspects, now)
        earliest = restated["date"].min().date() if not restated.empty else None
        changed = pd.concat([fresh["date"], restated["date"]])
        closes_store.finish_batch(
            conn, batch_id, closes_new=len(fresh), closes_restated=len(restated),
            earliest_restated=earliest,
            earliest_changed=changed.min().date() if len(changed) else None,
        )
    report.batch_id = batch_id
    report.closes_new = len(fresh)
    report.closes_restated = len(restated)
    report.closes_unchanged = accepted - len(fresh) - len(restated)
    report.earliest_restated = earliest
    report.restatements = restated
    report.suspects = suspects
    return report


def read_closes(store: Store, symbols: Sequence[str] | None = None,
                start: dt.date | None = None, end: dt.date | None = None) -> pd.DataFrame:
    """The closes panel (dates x symbols) from the store."""
    with store.connect() as conn:
        return closes_store.read_panel(conn, symbols, start, end)


def read_returns(store: Store, settings: Settings, symbols: Sequence[str] | None = None,
                 start: dt.date | None = None, end: dt.date | None = None) -> pd.DataFrame:
    """Aligned returns from the store, as the settings' [returns] section defines them."""
    panel = read_closes(store, symbols, start, end)
    r = settings.returns
    return closes_to_returns(panel, kind=r.kind, horizon=r.horizon,  # type: ignore[arg-type]
                             fill_limit=r.fill_limit)


def instrument_summary(store: Store) -> pd.DataFrame:
    """One row per instrument: name, group, first and last date, number of closes, gaps.

    A gap is a date inside the instrument's first..last span on which some other
    instrument has a close and this one has none.
    """
    with store.connect() as conn:
        listed = closes_store.list_instruments(conn)
        panel = closes_store.read_panel(conn)
    rows = []
    dates = panel.index
    for inst in listed:
        if inst.symbol in panel.columns:
            has = panel[inst.symbol].notna().to_numpy()
            where = np.flatnonzero(has)
        else:
            where = np.zeros(0, dtype=np.int64)
        if where.size:
            first, last = int(where[0]), int(where[-1])
            count = int(where.size)
            gaps = (last - first + 1) - count
            rows.append((inst.symbol, inst.name, inst.group, dates[first].date(),
                         dates[last].date(), count, gaps))
        else:
            rows.append((inst.symbol, inst.name, inst.group, None, None, 0, 0))
    return pd.DataFrame(rows, columns=["symbol", "name", "group", "first", "last", "closes",
                                       "gaps"])


# --- evaluation over a date range ---------------------------------------------------------


def universe(store: Store, settings: Settings) -> list[str]:
    """The instruments evaluated: the configured ones, else every symbol in the store."""
    if settings.instruments:
        return settings.symbols
    with store.connect() as conn:
        return [row.symbol for row in closes_store.list_instruments(conn)]


def build_plan(settings: Settings, symbols: Sequence[str],
               rule_names: Sequence[str] | None = None) -> Plan:
    """The rules of the settings (optionally a subset by name) over `symbols`."""
    rules = build_rules(
        list(settings.rule_tables), symbols=list(symbols), groups=settings.groups,
        default_measure=settings.correlation.default_measure,
    )
    if rule_names:
        known = {rule.name for rule in rules}
        for name in rule_names:
            if name not in known:
                hint = difflib.get_close_matches(name, sorted(known), n=1)
                near = f"; did you mean '{hint[0]}'?" if hint else ""
                raise ConfigError(f"--rule: no rule named {name!r}{near}")
        rules = [rule for rule in rules if rule.name in set(rule_names)]
    return make_plan(rules, symbols, level=settings.correlation.level)


def _scope(settings: Settings, plan: Plan) -> str:
    r = settings.returns
    tables = [t for t in settings.rule_tables if t.get("name") in set(plan.rule_names)]
    return scope_hash({
        "rules": tables, "symbols": plan.symbols, "level": plan.level,
        "returns": [r.kind, r.horizon, r.fill_limit],
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
    returns = closes_to_returns(panel, kind=r.kind, horizon=r.horizon,  # type: ignore[arg-type]
                                fill_limit=r.fill_limit)
    without, unchanged = stale_inputs(panel)
    rows = panel.index.get_indexer(returns.index)
    return _Inputs(returns, [d.date() for d in returns.index], without[rows], unchanged[rows])


def evaluate_range(
    store: Store,
    settings: Settings,
    start: dt.date | None,
    end: dt.date | None,
    *,
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
    try:
        for day in replay(
            data.returns.to_numpy(), dates, plan, book, from_t=from_t, stop_t=stop_t,
            days_without_close=data.without_close, days_unchanged=data.unchanged,
            mutes=mutes, acknowledged=acked,
        ):
            report.days += 1
            if day.t < write_from:
                continue
            pending.append(day)
            stopping = should_stop is not None and should_stop()
            if (stopping or len(pending) >= commit_days or day.t == stop_t - 1
                    or time.monotonic() - last_commit >= commit_seconds):
                _commit_days(store, plan, scope, book, pending, watermark, report, clock())
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


def _commit_days(store: Store, plan: Plan, scope: str, book: AlertBook, days: list[DayEvents],
                 watermark: int, report: EvaluationReport, now: dt.datetime) -> None:
    rules = list(plan.rule_names)
    with store.begin() as conn:
        touched = alerts_store.delete_events_between(conn, rules, days[0].date, days[-1].date)
        measures = {rule.name: ",".join(rule.measures()) for rule in plan.rules}
        touched |= alerts_store.write_events(
            conn, [e for day in days for e in day.events], measures)
        for day in days:
            for event in day.events:
                if event.event == "opened":
                    report.opened += 1
                elif event.event == "cleared":
                    report.cleared += 1
                else:
                    report.reminders += 1
        alerts_store.refresh_states(conn, touched)
        last = days[-1].date
        alerts_store.update_open_alerts(conn, [
            (alert.key.rule, alert.key.target, alert.key.opened, alert.peak_value,
             alert.peak_date, alert.last_value, last)
            for rule in plan.rules for alert in book.open_alerts(rule)])
        alerts_store.save_state(
            conn, alerts_store.SavedState(scope, last, watermark, book.snapshot()), now)
    report.days_written += len(days)


# --- alerts, acknowledgements, mutes, series ---------------------------------------------


def canonical_pair(settings: Settings, symbols: Sequence[str], text: str) -> str:
    """'B/A' or 'A/B' -> the label the rules use ('A/B' in the order of the universe)."""
    parts = text.split("/")
    if len(parts) != 2 or not all(parts):
        raise ConfigError(f"--pair: {text!r} is not a pair written A/B")
    order = {symbol: k for k, symbol in enumerate(symbols)}
    for part in parts:
        if part not in order:
            near = difflib.get_close_matches(part, list(order), n=1)
            hint = f"; did you mean '{near[0]}'?" if near else ""
            raise ConfigError(f"--pair: {part!r} is not an instrument{hint}")
    a, b = sorted(parts, key=order.__getitem__)
    return f"{a}/{b}"


def list_alerts(store: Store, settings: Settings, *, open_only: bool = True,
                since: dt.date | None = None, pair: str | None = None,
                rule: str | None = None) -> pd.DataFrame:
    """Alerts as a table, newest first."""
    target = canonical_pair(settings, universe(store, settings), pair) if pair else None
    with store.connect() as conn:
        rows = alerts_store.list_alerts(conn, open_only=open_only, since=since, target=target,
                                        rule=rule)
    columns = ["id", "state", "severity", "rule", "target", "opened", "cleared", "value",
               "peak", "level", "acknowledged_by"]
    return pd.DataFrame(
        [(a.id, a.state, a.severity, a.rule, a.target, a.opened_on, a.cleared_on,
          a.last_value, a.peak_value, a.level, a.acknowledged_by) for a in rows],
        columns=columns,
    )


def acknowledge(store: Store, settings: Settings, alert_id: int, *, by: str, note: str = "",
                now: dt.datetime | None = None) -> alerts_store.AlertRow:
    """Record an acknowledgement; the alert stays open but stops being announced."""
    now = now or dt.datetime.now(dt.UTC)
    if not by.strip():
        raise ComoveError("--by: give the name of the person acknowledging")
    with store.begin() as conn:
        alert = alerts_store.get_alert(conn, alert_id)
        if alert is None:
            raise ComoveError(f"alert {alert_id} does not exist (comove alerts --all lists them)")
        alerts_store.acknowledge(conn, alert_id, by=by.strip(), note=note, at=now,
                                 effective_on=desk_today(settings, now))
        found = alerts_store.get_alert(conn, alert_id)
    assert found is not None
    return found


def mute(store: Store, settings: Settings, *, rule: str | None, pair: str | None,
         until: dt.date, reason: str, now: dt.datetime | None = None) -> int:
    """Mute a rule or a target until a date: still recorded, not announced."""
    now = now or dt.datetime.now(dt.UTC)
    today = desk_today(settings, now)
    if (rule is None) == (pair is None):
        raise ComoveError("give exactly one of --rule NAME or --pair A/B")
    if not reason.strip():
        raise ComoveError("--reason: say why (it is kept with the mute)")
    if until < today:
        raise ComoveError(f"--until: {until} is before today ({today})")
    symbols = universe(store, settings)
    if rule is not None:
        build_plan(settings, symbols, [rule])
    target = canonical_pair(settings, symbols, pair) if pair else None
    with store.begin() as conn:
        return alerts_store.add_mute(conn, rule=rule, target=target, from_on=today,
                                     until=until, reason=reason.strip(), now=now)


def series(store: Store, settings: Settings, a: str, b: str, measure: str, *,
           start: dt.date | None = None, end: dt.date | None = None) -> pd.DataFrame:
    """One pair's measure from the store: date, value, band low/high and n per day."""
    symbols = universe(store, settings)
    label = canonical_pair(settings, symbols, f"{a}/{b}")
    spec = parse_measure(measure)
    returns = read_returns(store, settings, [a, b], None, end)
    if returns.empty:
        raise ComoveError(f"no returns for {label}: ingest closes first")
    values = returns[[a, b]].to_numpy()
    rows = [(d.t, d.value[0], d.low[0], d.high[0], d.n[0])
            for d in stream(values, spec, pairs=np.array([[0, 1]]),
                            level=settings.correlation.level)]
    frame = pd.DataFrame(rows, columns=["t", "value", "low", "high", "n"])
    frame.insert(0, "date", [returns.index[t].date() for t in frame.pop("t")])
    if start is not None:
        frame = frame.loc[frame["date"] >= start]
    return frame.reset_index(drop=True)


# --- the digest ---------------------------------------------------------------------------

STALE_DAYS_NOTED = 3
"""Business days without a new close after which the digest lists an instrument as stale
(common practice for daily data; a `stale` rule can alert on its own threshold)."""


@dataclass
class DigestOutcome:
    """A rendered (and perhaps sent) digest."""

    as_of: dt.date
    folder: Path
    paths: Any
    subject: str
    outbox_id: int | None = None
    status: str = "rendered"  # rendered | sent | failed | already sent
    attempts: int = 0
    error: str = ""


def _data_issues(store: Store, panel: pd.DataFrame, day: dt.date, as_of: dt.date,
                 now: dt.datetime) -> tuple[list[Any], str]:
    from monitor.digest import DataIssueView

    issues: list[DataIssueView] = []
    if panel.empty:
        return issues, "no closes in the store"
    without, unchanged = stale_inputs(panel)
    row = len(panel) - 1
    last_dates = {s: panel[s].last_valid_index() for s in panel.columns}
    for k, symbol in enumerate(panel.columns):
        gap = without[row, k]
        last = last_dates[symbol]
        if np.isfinite(gap) and gap >= STALE_DAYS_NOTED and last is not None:
            issues.append(DataIssueView("stale", symbol, last.date(),
                                        f"no new close for {int(gap)} business days"))
        elif np.isfinite(gap) and gap >= 1 and last is not None:
            issues.append(DataIssueView("missing", symbol, day, "no close on this day; last "
                                        f"close {last.date()}"))
        if np.isfinite(unchanged[row, k]) and unchanged[row, k] >= 5 and gap == 0:
            issues.append(DataIssueView("stale", symbol, day, "close unchanged for "
                                        f"{int(unchanged[row, k])} business days"))
    recent = pd.Timestamp(day) - pd.Timedelta(days=10)
    with store.connect() as conn:
        suspects = closes_store.list_suspects(conn)
        revisions = closes_store.list_revisions(conn)
    for r in suspects.itertuples():
        if recent <= pd.Timestamp(r.date) <= pd.Timestamp(day):
            issues.append(DataIssueView(
                "suspect", r.symbol, r.date, f"close {r.close:g} after {r.previous_close:g} "
                f"(log return {r.log_return:+.3f}); accepted, please check"))
    week_ago = now - dt.timedelta(days=7)
    for r in revisions.itertuples():
        revised = r.revised_at if r.revised_at.tzinfo else r.revised_at.replace(tzinfo=dt.UTC)
        if week_ago <= revised <= now:
            issues.append(DataIssueView("restated", r.symbol, r.date,
                                        f"close restated {r.old_close:g} -> {r.new_close:g} "
                                        f"from {Path(r.source_file).name}"))
    attention = ""
    if day < as_of and as_of.weekday() < 5:
        attention = (f"No closes for {as_of}: the latest closes are from {day}. "
                     "Check the data feed before reading the numbers below.")
    elif any(i.kind in ("stale", "missing") for i in issues):
        count = len({i.symbol for i in issues if i.kind in ("stale", "missing")})
        attention = f"{count} instrument(s) have stale or missing closes; see Data quality."
    return issues, attention


def digest_context(store: Store, settings: Settings, as_of: dt.date,
                   now: dt.datetime | None = None) -> Any:
    """The digest's context for `as_of` from the store (see monitor.digest.build)."""
    from monitor.digest import AlertFacts, DigestInputs, build_context

    now = now or dt.datetime.now(dt.UTC)
    symbols = universe(store, settings)
    plan = build_plan(settings, symbols)
    panel = read_closes(store, symbols, None, as_of)
    r = settings.returns
    returns = closes_to_returns(panel, kind=r.kind, horizon=r.horizon,  # type: ignore[arg-type]
                                fill_limit=r.fill_limit)
    if returns.empty:
        raise ComoveError(f"no returns on or before {as_of}: ingest closes first")
    day = returns.index[-1].date()
    names = {i.symbol: i.name for i in settings.instruments}
    with store.connect() as conn:
        rows = alerts_store.list_alerts(conn, open_on=day)
        if as_of > day:
            # The data-feed alert is about the days after the last close itself.
            rows += [a for a in alerts_store.list_alerts(conn, open_on=as_of, rule=FEED_RULE)
                     if a.opened_on > day]
        today_events = alerts_store.events_for(conn, date=day)
    by_alert: dict[int, dict[str, Any]] = {}
    for event in today_events:
        by_alert[event["alert_id"]] = event
    facts = [
        AlertFacts(
            id=a.id, rule=a.rule, target=a.target, opened_on=a.opened_on,
            first_breach_on=a.first_breach_on,
            # As the evening of `day` saw it, whatever happened to the alert later.
            state="cleared" if a.cleared_on == day else "open",
            cleared_on=a.cleared_on if a.cleared_on == day else None,
            severity=a.severity, rule_kind=a.rule_kind,
            announced=bool(by_alert.get(a.id, {}).get("announce", a.announced)),
            acknowledged_by=_acked_by(a, day), acknowledged_at=a.acknowledged_at
            if _acked_by(a, day) else None,
            acknowledged_note=a.acknowledged_note if _acked_by(a, day) else None,
            reminded_today=by_alert.get(a.id, {}).get("event") == "continuing",
            event_today=by_alert.get(a.id),
        )
        for a in rows
        if a.rule in plan.rule_names and a.opened_on <= day or a.rule == FEED_RULE
    ]
    issues, attention = _data_issues(store, panel, day, as_of, now)
    c = settings.correlation
    inputs = DigestInputs(
        desk=settings.desk.name, as_of=as_of, generated_at=now, returns=returns,
        names=names, groups=settings.groups, rules={rule.name: rule for rule in plan.rules},
        alerts=facts, monitored_pairs=plan.pairs, measures=c.measures, return_kind=r.kind,
        horizon=r.horizon, level=c.level, movers_days=c.movers_days, gauge_days=c.gauge_days,
        history_days=c.history_days, data_issues=issues, attention=attention,
        data_through=panel.index[-1].date(),
    )
    return build_context(inputs)


def _acked_by(alert: alerts_store.AlertRow, day: dt.date) -> str | None:
    """Who had acknowledged the alert by the end of `day` (None: nobody yet)."""
    at = alert.acknowledged_at
    if at is None:
        return None
    return alert.acknowledged_by if at.date() <= day else None


def digest_folder(settings: Settings, as_of: dt.date) -> Path:
    return settings.resolve_path(settings.digest.folder) / as_of.isoformat()


def render_digest_files(store: Store, settings: Settings, as_of: dt.date,
                        out_dir: Path | None = None, now: dt.datetime | None = None
                        ) -> DigestOutcome:
    """Render the digest for `as_of` into a folder: digest.html with PNGs, .txt and .eml."""
    from monitor.digest import build_message, render_digest, write_digest

    now = now or dt.datetime.now(dt.UTC)
    ctx = digest_context(store, settings, as_of, now)
    rendered = render_digest(ctx)
    d = settings.digest
    message = build_message(rendered, sender=d.sender, recipients=list(d.recipients) or
                            [d.sender], date=now, message_id_domain=_domain(d.sender))
    folder = out_dir or digest_folder(settings, as_of)
    paths = write_digest(rendered, folder, message=message)
    return DigestOutcome(as_of=as_of, folder=Path(folder), paths=paths,
                         subject=rendered.subject)


def _domain(address: str) -> str:
    return address.rpartition("@")[2] or "localhost"


def send_digest(
    store: Store,
    settings: Settings,
    as_of: dt.date,
    *,
    resend: bool = False,
    environ: dict[str, str] | None = None,
    sleep: Callable[[float], None] = time.sleep,
    now: dt.datetime | None = None,
) -> DigestOutcome:
    """Render, store in the outbox, then send the digest for `as_of`.

    A date whose digest was sent is not sent again unless `resend`. A digest already in
    the outbox as pending or failed is sent as stored (so a retry sends what was rendered
    when the day was evaluated). A failed send stays in the outbox with its error and
    raises MailError; the next call retries it.
    """
    import os

    from monitor.digest import MailError, SmtpSettings, send_message

    now = now or dt.datetime.now(dt.UTC)
    d = settings.digest
    if not d.recipients:
        raise ComoveError("digest.recipients is empty: nothing to send (comove digest --out "
                          "DIR renders it without sending)")
    env = dict(os.environ) if environ is None else environ
    password = None
    if d.username:
        if not d.password_env:
            raise ConfigError("digest.password_env: name the environment variable that holds "
                              "the SMTP password for digest.username")
        password = env.get(d.password_env)
        if password is None:
            raise ConfigError(f"digest.password_env: environment variable {d.password_env} is "
                              "not set")
    with store.connect() as conn:
        sent = outbox_store.sent_for(conn, as_of)
        waiting = [row for row in outbox_store.for_date(conn, as_of)
                   if row.status in ("pending", "failed")]
    if sent is not None and not resend:
        return DigestOutcome(as_of=as_of, folder=Path(sent.folder), paths=None,
                             subject=sent.subject, outbox_id=sent.id, status="already sent")
    if waiting and not resend:
        row = waiting[-1]
        outbox_id, raw, subject, folder = row.id, row.message, row.subject, Path(row.folder)
        paths = None
    else:
        outcome = render_digest_files(store, settings, as_of, now=now)
        raw = outcome.paths.eml.read_bytes()
        subject, folder, paths = outcome.subject, outcome.folder, outcome.paths
        with store.begin() as conn:
            outbox_id = outbox_store.add(conn, as_of=as_of, subject=subject,
                                         recipients=list(d.recipients), folder=str(folder),
                                         message=raw, now=now)
    message = _parse_eml(raw)
    smtp = SmtpSettings(host=d.smtp_host, port=d.smtp_port,
                        security=d.security,  # type: ignore[arg-type]
                        username=d.username or None, password_env=d.password_env or None)
    context = None
    if d.ca_file:
        import ssl

        context = ssl.create_default_context(cafile=str(settings.resolve_path(d.ca_file)))
    try:
        result = send_message(message, smtp, password=password, attempts=d.attempts,
                              backoff_seconds=d.backoff_seconds, sleep=sleep,
                              ssl_context=context)
    except MailError as exc:
        with store.begin() as conn:
            outbox_store.mark_failed(conn, outbox_id, attempts=exc.attempts, error=str(exc))
        raise
    with store.begin() as conn:
        outbox_store.mark_sent(conn, outbox_id, attempts=result.attempts, now=now)
    return DigestOutcome(as_of=as_of, folder=folder, paths=paths, subject=subject,
                         outbox_id=outbox_id, status="sent", attempts=result.attempts)


def _parse_eml(raw: bytes) -> Any:
    from email import message_from_bytes
    from email.policy import SMTP

    return message_from_bytes(raw, policy=SMTP)


# --- the daily run ------------------------------------------------------------------------

LEASE_NAME = "evaluation"
"""One lease for everything that evaluates: the daily run and shell backfills."""
LEASE_TTL = dt.timedelta(minutes=30)
FEED_RULE = "data-feed"
"""Built-in data-quality alert: a scheduled run date with no new closes at run time."""


class LeaseHeld(ComoveError):
    """Another process holds the evaluation lease."""


def lease_owner() -> str:
    import os
    import socket
    import uuid

    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


@contextmanager
def evaluation_lease(store: Store, *, wait_seconds: float = 0.0, owner: str | None = None,
                     clock: Callable[[], dt.datetime] | None = None) -> Iterator[str]:
    """Hold the evaluation lease for the block; wait up to `wait_seconds` for a holder to
    finish, then stop with LeaseHeld naming it. An expired lease (its process died) is
    taken over."""
    me = owner or lease_owner()
    now = clock or (lambda: dt.datetime.now(dt.UTC))
    deadline = time.monotonic() + wait_seconds
    while True:
        with store.begin(immediate=True) as conn:
            holder = runs_store.take_lease(conn, LEASE_NAME, me, now=now(), ttl=LEASE_TTL)
            if holder is not None and _owner_is_dead(holder.owner):
                # A process on this machine that no longer exists cannot finish its work;
                # waiting for its lease to expire would only delay the day.
                runs_store.release_lease(conn, LEASE_NAME, holder.owner)
                holder = runs_store.take_lease(conn, LEASE_NAME, me, now=now(), ttl=LEASE_TTL)
        if holder is None:
            break
        if time.monotonic() >= deadline:
            raise LeaseHeld(f"another comove process ({holder.owner}) is evaluating until "
                            f"{holder.expires:%Y-%m-%d %H:%M} UTC at the latest; try again "
                            "when it is done")
        time.sleep(0.5)
    try:
        yield me
    finally:
        with store.begin(immediate=True) as conn:
            runs_store.release_lease(conn, LEASE_NAME, me)


def backfill(store: Store, settings: Settings, start: dt.date | None, end: dt.date | None,
             **options: Any) -> EvaluationReport:
    """`evaluate_range` under the evaluation lease, so it never overlaps a daily run."""
    with evaluation_lease(store):
        with store.begin() as conn:
            runs_store.close_unfinished(conn, now=dt.datetime.now(dt.UTC))
        return evaluate_range(store, settings, start, end, **options)


def _owner_is_dead(owner: str) -> bool:
    import os
    import socket

    host, _, rest = owner.partition(":")
    pid_text = rest.partition(":")[0]
    if host != socket.gethostname() or not pid_text.isdigit():
        return False
    try:
        os.kill(int(pid_text), 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    return False


def renew(store: Store, owner: str) -> None:
    with store.begin(immediate=True) as conn:
        runs_store.renew_lease(conn, LEASE_NAME, owner, now=dt.datetime.now(dt.UTC),
                               ttl=LEASE_TTL)


@dataclass
class CollectReport:
    accepted: list[IngestReport] = field(default_factory=list)
    rejected: list[tuple[Path, str]] = field(default_factory=list)


def collect_inbox(store: Store, settings: Settings, *, today: dt.date | None = None,
                  now: dt.datetime | None = None) -> CollectReport:
    """Ingest every file in the inbox (each all-or-nothing), then move it to `processed/`
    or to `rejected/` with a `.problems.txt` report beside it."""
    inbox = settings.inbox
    inbox.mkdir(parents=True, exist_ok=True)
    report = CollectReport()
    files = sorted(p for p in inbox.iterdir()
                   if p.is_file() and (p.name.endswith(".csv") or p.name.endswith(".csv.gz")))
    for path in files:
        try:
            result = ingest_file(store, settings, path, today=today, now=now)
        except IngestError as exc:
            target = _move(path, inbox / "rejected")
            lines = [str(exc), *exc.problems]
            (target.parent / f"{target.name}.problems.txt").write_text(
                "\n".join(lines) + "\n", encoding="utf-8")
            report.rejected.append((target, str(exc)))
            continue
        _move(path, inbox / "processed")
        report.accepted.append(result)
    return report


def _move(path: Path, folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / path.name
    if target.exists():
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%S%f")
        target = folder / f"{stamp}-{path.name}"
    path.replace(target)
    return target


@dataclass
class DailyReport:
    as_of: dt.date
    status: str  # done | already done | failed
    run_id: int | None = None
    collected: CollectReport | None = None
    evaluation: EvaluationReport | None = None
    digest: DigestOutcome | None = None
    feed_problem: str = ""
    pages: Any = None
    message: str = ""


def _feed_alert(store: Store, settings: Settings, as_of: dt.date, last_close: dt.date | None,
                ) -> str:
    """Open (or keep open) the data-feed alert when `as_of` has no closes; clear it when
    closes are there again. Returns the problem text, or '' when the feed is fine."""
    with store.begin() as conn:
        open_alerts = [a for a in alerts_store.list_alerts(conn, open_only=True, rule=FEED_RULE)]
        if last_close is not None and last_close >= as_of:
            for alert in open_alerts:
                alerts_store.write_events(conn, [_feed_event(alert.opened_on, as_of, "cleared",
                                                             last_close)])
                alerts_store.refresh_states(conn, [alert.id])
            return ""
        problem = (f"no new closes for {as_of} by run time; latest closes are from "
                   f"{last_close or 'never'}")
        opened = open_alerts[0].opened_on if open_alerts else as_of
        event = "continuing" if open_alerts else "opened"
        alerts_store.delete_events_on(conn, [FEED_RULE], as_of)
        ids = alerts_store.write_events(conn, [_feed_event(opened, as_of, event, last_close)])
        alerts_store.refresh_states(conn, ids)
    return problem


def _feed_event(opened: dt.date, day: dt.date, event: str,
                last_close: dt.date | None) -> alerts_store.EventRow:
    held = (day - opened).days + 1
    gap = float((day - last_close).days) if last_close else math.nan
    return alerts_store.EventRow(
        rule=FEED_RULE, target="all", opened=opened, first_breach=opened,
        rule_kind="stale", severity="critical", event=event, date=day, value=gap,
        level=1.0, low=math.nan, high=math.nan, n=math.nan, z=math.nan, p=math.nan,
        reference=math.nan, peak_value=gap, peak_date=day, days_held=held, announce=True)


def run_daily(
    store: Store,
    settings: Settings,
    as_of: dt.date,
    *,
    force: bool = False,
    send: bool = True,
    pages_dir: Path | None = None,
    now: dt.datetime | None = None,
    environ: dict[str, str] | None = None,
    sleep: Callable[[float], None] = time.sleep,
    wait_seconds: float = 0.0,
) -> DailyReport:
    """The daily job: lease, collect the inbox, evaluate, digest (outbox, send), pages,
    ledger. Idempotent: a second run for a done as-of date changes nothing unless `force`.
    """
    moment = now or dt.datetime.now(dt.UTC)
    with store.connect() as conn:
        done = [r for r in runs_store.list_runs(conn, kind="daily", as_of=as_of, status="done")]
    if done and not force:
        return DailyReport(as_of=as_of, status="already done", run_id=done[-1].id,
                           message=f"the daily run for {as_of} is already done (run "
                                   f"{done[-1].id}); --force reruns it")
    with evaluation_lease(store, wait_seconds=wait_seconds) as owner:
        with store.begin() as conn:
            # Holding the lease, any run still marked running was cut short (its process
            # died): say so in the ledger instead of leaving it running forever.
            runs_store.close_unfinished(conn, now=dt.datetime.now(dt.UTC))
            run_id = runs_store.start_run(conn, kind="daily", as_of=as_of, range_start=None,
                                          params_hash="", now=moment)
        report = DailyReport(as_of=as_of, status="running", run_id=run_id)
        try:
            report.collected = collect_inbox(store, settings, today=as_of, now=moment)
            renew(store, owner)
            with store.connect() as conn:
                last = closes_store.last_close_date(conn, as_of)
            report.feed_problem = _feed_alert(store, settings, as_of, last)
            if last is not None:
                report.evaluation = evaluate_range(store, settings, None, as_of, kind="evaluation",
                                                   now=lambda: dt.datetime.now(dt.UTC))
            renew(store, owner)
            if last is not None:
                if send and settings.digest.recipients:
                    report.digest = send_digest(store, settings, as_of, resend=force,
                                                environ=environ, sleep=sleep, now=moment)
                else:
                    report.digest = render_digest_files(store, settings, as_of, now=moment)
            if pages_dir is not None:
                report.pages = build_pages(store, settings, pages_dir, now=moment)
        except Exception as exc:
            with store.begin() as conn:
                runs_store.finish_run(conn, run_id, status="failed", now=dt.datetime.now(dt.UTC),
                                      counts=_daily_counts(report),
                                      error=f"{type(exc).__name__}: {exc}")
            raise
        report.status = "done"
        with store.begin() as conn:
            runs_store.finish_run(conn, run_id, status="done", now=dt.datetime.now(dt.UTC),
                                  counts=_daily_counts(report))
    return report


def _daily_counts(report: DailyReport) -> dict[str, object]:
    counts: dict[str, object] = {}
    if report.collected is not None:
        counts["files_accepted"] = len(report.collected.accepted)
        counts["files_rejected"] = len(report.collected.rejected)
        counts["closes_new"] = sum(r.closes_new for r in report.collected.accepted)
    if report.evaluation is not None:
        counts.update({f"evaluation_{k}": v for k, v in report.evaluation.counts().items()})
    if report.digest is not None:
        counts["digest"] = report.digest.status
    if report.feed_problem:
        counts["feed_problem"] = report.feed_problem
    return counts


def last_completed_daily(store: Store) -> dt.date | None:
    with store.connect() as conn:
        done = runs_store.list_runs(conn, kind="daily", status="done")
    return max((r.as_of for r in done), default=None)


def build_pages(store: Store, settings: Settings, out_dir: Path,
                now: dt.datetime | None = None) -> Any:
    """Rebuild the history site in `out_dir` from the store, with the digest archive."""
    import shutil

    from monitor.pages import DigestLink, SiteInputs, build_site, build_site_context

    now = now or dt.datetime.now(dt.UTC)
    symbols = universe(store, settings)
    plan = build_plan(settings, symbols)
    returns = read_returns(store, settings, symbols)
    with store.connect() as conn:
        alerts = alerts_store.list_alerts(conn)
        events = alerts_store.events_for(conn)
        acks = alerts_store.list_acknowledgements(conn)
        runs = runs_store.list_runs(conn)
        waiting = {row.as_of: row for row in outbox_store.unsent(conn)}
    # The digest archive: each rendered digest folder is copied beside the pages.
    archive = out_dir / "digests"
    links = []
    source = settings.resolve_path(settings.digest.folder)
    if source.is_dir():
        for folder in sorted(p for p in source.iterdir() if (p / "digest.html").is_file()):
            target = archive / folder.name
            if target.exists():
                shutil.rmtree(target)
            shutil.copytree(folder, target)
            try:
                day = dt.date.fromisoformat(folder.name)
            except ValueError:
                continue
            subject = _digest_subject(folder)
            status = "not sent yet" if day in waiting else ""
            links.append(DigestLink(as_of=day, path=f"digests/{folder.name}/digest.html",
                                    subject=subject, status=status))
    inputs = SiteInputs(
        desk=settings.desk.name, generated_at=now, returns=returns,
        names={i.symbol: i.name for i in settings.instruments}, groups=settings.groups,
        rules=plan.rules, rule_tables=settings.rule_tables,
        alerts=alerts, events=events, acknowledgements=acks, runs=runs, digests=links,
        measures=settings.correlation.measures, return_kind=settings.returns.kind,
        level=settings.correlation.level,
    )
    return build_site(build_site_context(inputs), out_dir)


def _digest_subject(folder: Path) -> str:
    from email import message_from_bytes
    from email.policy import default

    eml = folder / "digest.eml"
    if not eml.is_file():
        return ""
    return str(message_from_bytes(eml.read_bytes(), policy=default).get("Subject", ""))


def latest_close_date(store: Store) -> dt.date:
    with store.connect() as conn:
        last = closes_store.last_close_date(conn)
    if last is None:
        raise ComoveError("the store has no closes yet: comove ingest FILE first")
    return last


def schedule_of(settings: Settings) -> Any:
    from monitor.scheduler import parse_schedule

    return parse_schedule(settings.section("schedule"), desk_timezone=settings.desk.timezone,
                          base_dir=settings.base_dir)


def pages_folder(settings: Settings) -> Path:
    return settings.resolve_path("pages")


def run_days(store: Store, settings: Settings, as_of: dt.date, *, force: bool = False,
             catch_up: bool = True, log: Callable[[str], None] = print) -> list[DailyReport]:
    """Run every missed scheduled day since the last completed run (each with its own
    ledger row and its own digest, oldest first), then `as_of`."""
    from monitor.scheduler import business_days_between

    schedule = schedule_of(settings)
    days = [as_of]
    last = last_completed_daily(store)
    if catch_up and last is not None and last < as_of:
        days = business_days_between(schedule, last, as_of)
        if as_of not in days:
            days.append(as_of)
    reports = []
    for day in days:
        report = run_daily(store, settings, day, force=force and day == as_of,
                           pages_dir=pages_folder(settings))
        reports.append(report)
        log(_describe_daily(report))
    return reports


def _describe_daily(report: DailyReport) -> str:
    if report.status == "already done":
        return report.message
    parts = [f"daily run {report.run_id} for {report.as_of}: {report.status}"]
    if report.collected is not None:
        parts.append(f"{len(report.collected.accepted)} file(s) ingested, "
                     f"{len(report.collected.rejected)} rejected")
    if report.feed_problem:
        parts.append(f"DATA: {report.feed_problem}")
    if report.evaluation is not None:
        e = report.evaluation
        parts.append(f"{e.opened} opened, {e.cleared} cleared")
    if report.digest is not None:
        parts.append(f"digest {report.digest.status}: {report.digest.folder}")
    return "; ".join(parts)


def run_daily_command(store: Store, settings: Settings, *, once: bool, as_of: dt.date | None,
                      force: bool, catch_up: bool) -> int:
    """`comove run`: once now, or the scheduler (catching up missed days at start)."""
    import logging

    from monitor.scheduler import run_scheduler, setup_logging

    log_dir = (Path(store.engine.url.database).parent if store.is_sqlite and
               store.engine.url.database else settings.base_dir)
    logger = setup_logging(log_dir)
    schedule = schedule_of(settings)
    if once:
        day = as_of or dt.datetime.now(schedule.zone).date()
        run_days(store, settings, day, force=force, catch_up=catch_up, log=logger.info)
        return 0

    def job(day: dt.date) -> object:
        return run_days(store, settings, day, catch_up=True, log=logger.info)

    if catch_up:
        today = dt.datetime.now(schedule.zone).date()
        last = last_completed_daily(store)
        if last is not None:
            from monitor.scheduler import business_days_between, previous_fire_time

            fired = previous_fire_time(schedule, dt.datetime.now(schedule.zone))
            through = fired.date() if fired else today
            missed = business_days_between(schedule, last, through)
            if missed:
                logger.info("catching up %d missed day(s): %s", len(missed),
                            ", ".join(map(str, missed)))
                run_days(store, settings, missed[-1], catch_up=True, log=logger.info)
    jobstore = _jobstore_url(store, settings)
    logging.getLogger("comove").info("job store: %s", jobstore.split("@")[-1])
    run_scheduler(schedule, job, jobstore_url=jobstore, logger=logger)
    return 0


def _jobstore_url(store: Store, settings: Settings) -> str:
    if store.is_sqlite and store.engine.url.database:
        path = Path(store.engine.url.database)
        return f"sqlite:///{path.with_name(path.stem + '-schedule.sqlite')}"
    return store.engine.url.render_as_string(hide_password=False)
