"""The only module that wires the store to the computation.

The CLI and the scheduler call these functions; each opens what it needs from the store,
hands plain frames and arrays to the pure modules and writes the results back.
"""

from __future__ import annotations

import datetime as dt
import difflib
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from monitor.alerts import AlertBook, AlertEvent
from monitor.config import Settings
from monitor.engine import parse_measure, stream
from monitor.errors import ComoveError, ConfigError, IngestError
from monitor.evaluation import (
    AckLookup,
    DayEvents,
    Mute,
    Plan,
    make_plan,
    replay,
    scope_hash,
    stale_inputs,
)
from monitor.ingest import FileFormat, find_suspects, parse_closes, read_bytes
from monitor.returns import closes_to_returns
from monitor.rules import Rule, build_rules
from storage import Store, open_store
from storage import alerts as alerts_store
from storage import closes as closes_store
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


def _event_rows(plan: Plan, events: Sequence[AlertEvent]) -> list[alerts_store.EventRow]:
    measures = {rule.name: ",".join(rule.measures()) for rule in plan.rules}
    return [
        alerts_store.EventRow(
            rule=e.rule, target=e.target, opened_on=e.opened, first_breach_on=e.first_breach,
            rule_kind=e.rule_kind, severity=e.severity, measure=measures.get(e.rule, ""),
            event=e.event, date=e.date, value=e.value, level=e.level, low=e.low, high=e.high,
            n=e.n, z=e.z, p=e.p, reference=e.reference, peak_value=e.peak_value,
            peak_on=e.peak_date, days_held=e.days_held, announce=e.announce,
        )
        for e in events
    ]


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
) -> EvaluationReport:
    """Evaluate the rules on every business day from `start` to `end` and store the alerts.

    Idempotent: the events of the days in the range are replaced by the replay's, keyed
    by (rule, target, opened date), so a rerun gives identical alerts and events and keeps
    every acknowledgement. Work is committed every `commit_days` days or `commit_seconds`
    (whichever comes first) together with the alert state, so an interrupted run keeps
    what it committed and a rerun resumes from there. A change to the closes on or before
    the saved state's date (a restatement, or history ingested later) makes the replay
    start again from the first day, and so does `force`.
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
            if (len(pending) >= commit_days or day.t == stop_t - 1
                    or time.monotonic() - last_commit >= commit_seconds):
                _commit_days(store, plan, scope, book, pending, watermark, report, clock())
                pending = []
                last_commit = time.monotonic()
                if progress is not None:
                    progress(report.days_written, total, day.date)
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
        touched: set[int] = set()
        for day in days:
            touched |= alerts_store.delete_events_on(conn, rules, day.date)
            touched |= alerts_store.write_events(conn, _event_rows(plan, day.events))
            for event in day.events:
                if event.event == "opened":
                    report.opened += 1
                elif event.event == "cleared":
                    report.cleared += 1
                else:
                    report.reminders += 1
        alerts_store.refresh_states(conn, touched)
        last = days[-1].date
        for rule in plan.rules:
            for alert in book.open_alerts(rule):
                alerts_store.update_open_alert(
                    conn, alert.key.rule, alert.key.target, alert.key.opened,
                    peak_value=alert.peak_value, peak_on=alert.peak_date,
                    last_value=alert.last_value, last_on=last)
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
