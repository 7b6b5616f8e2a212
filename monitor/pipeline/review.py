"""What the desk does with alerts from the shell: list, acknowledge, mute, and one pair's series."""

from __future__ import annotations

import datetime as dt
import difflib
from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd

from monitor import api
from monitor.config import Settings
from monitor.engine import parse_measure
from monitor.errors import ComoveError, ConfigError
from monitor.pipeline.evaluate import build_plan
from monitor.pipeline.store import desk_today, read_returns, universe
from monitor.rules import split_pair
from storage import Store
from storage import alerts as alerts_store


def canonical_pair(settings: Settings, symbols: Sequence[str], text: str) -> str:
    """'B/A' or 'A/B' -> the label the rules use ('A/B' in the order of the universe). A
    symbol may hold '/' itself ("EUR/USD/KLV" pairs EUR/USD with KLV)."""
    order = {symbol: k for k, symbol in enumerate(symbols)}
    readings = split_pair(text, order)
    if len(readings) > 1:
        choices = " or ".join(f"'{a}' with '{b}'" for a, b in readings)
        raise ConfigError(f"--pair: {text!r} is ambiguous: {choices}")
    parts = list(readings[0]) if readings else text.split("/")
    if len(parts) != 2 or not all(parts):
        raise ConfigError(f"--pair: {text!r} is not a pair written A/B")
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
    columns = ["id", "state", "severity", "rule", "kind", "target", "first_breach", "opened",
               "cleared", "value", "peak", "threshold", "acknowledged_by"]
    return pd.DataFrame(
        [(a.id, a.state, a.severity, a.rule, a.rule_kind, a.target, a.first_breach_on,
          a.opened_on, a.cleared_on,
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
         until: dt.date, reason: str, from_on: dt.date | None = None,
         allow_past: bool = False, now: dt.datetime | None = None) -> int:
    """Mute a rule or a target from a day (today by default) until a day: still recorded,
    not announced. A day before today needs `allow_past` (muting history for a backfill)."""
    now = now or dt.datetime.now(dt.UTC)
    today = desk_today(settings, now)
    first = from_on or today
    if (rule is None) == (pair is None):
        raise ComoveError("give exactly one of --rule NAME or --pair A/B")
    if not reason.strip():
        raise ComoveError("--reason: say why (it is kept with the mute)")
    for option, day in (("--until", until), ("--from", first)):
        if day < today and not allow_past:
            raise ComoveError(f"{option}: {day} is before today ({today}); add --allow-past "
                              "to mute days already past (for a backfill of history)")
    if until < first:
        raise ComoveError(f"--until: {until} is before the first muted day ({first})")
    symbols = universe(store, settings)
    if rule is not None:
        build_plan(settings, symbols, [rule])
    target = canonical_pair(settings, symbols, pair) if pair else None
    with store.begin() as conn:
        return alerts_store.add_mute(conn, rule=rule, target=target, from_on=first,
                                     until=until, reason=reason.strip(), now=now)


def mute_state(row: Mapping[str, Any], today: dt.date) -> str:
    """'active', 'ended' (its last day is past) or 'coming' (it starts after today)."""
    if row["until"] < today:
        return "ended"
    return "coming" if row["from_on"] > today else "active"


def list_mutes(store: Store, settings: Settings, *, include_ended: bool = False,
               now: dt.datetime | None = None) -> pd.DataFrame:
    """The mutes, oldest first: active and coming ones, or every one with `include_ended`."""
    today = desk_today(settings, now)
    with store.connect() as conn:
        rows = alerts_store.list_mutes(conn)
    records = [
        (m["id"], mute_state(m, today), m["rule"] or "-", m["target"] or "-", m["from_on"],
         m["until"], m["reason"])
        for m in rows if include_ended or mute_state(m, today) != "ended"
    ]
    return pd.DataFrame(records, columns=["id", "state", "rule", "target", "from", "until",
                                          "reason"])


def unmute(store: Store, settings: Settings, mute_id: int,
           now: dt.datetime | None = None) -> str:
    """Lift a mute from today on. Its past days stay muted, as they were announced (or
    not); a mute that has not started yet is removed. Returns what was done."""
    today = desk_today(settings, now)
    with store.begin() as conn:
        row = alerts_store.get_mute(conn, mute_id)
        if row is None:
            raise ComoveError(f"mute {mute_id} does not exist (comove mutes --all lists them)")
        what = row["rule"] or row["target"]
        if row["until"] < today:
            raise ComoveError(f"mute {mute_id} ({what}) already ended on {row['until']}")
        if row["from_on"] >= today:
            alerts_store.delete_mute(conn, mute_id)
            return f"mute {mute_id} ({what}) removed: it had not muted any day yet"
        last = today - dt.timedelta(days=1)
        alerts_store.end_mute(conn, mute_id, last)
    return (f"mute {mute_id} ({what}) lifted: it muted {row['from_on']} to {last}; alerts "
            "are announced again from today")


def unacknowledge(store: Store, settings: Settings, alert_id: int) -> alerts_store.AlertRow:
    """Remove an alert's acknowledgements: it is back on the needs-attention list and its
    reminders resume from the next evaluation."""
    with store.begin() as conn:
        alert = alerts_store.get_alert(conn, alert_id)
        if alert is None:
            raise ComoveError(f"alert {alert_id} does not exist (comove alerts --all lists them)")
        if not alerts_store.remove_acknowledgements(conn, alert_id):
            raise ComoveError(f"alert {alert_id} is not acknowledged")
        alerts_store.refresh_states(conn, [alert_id])
        found = alerts_store.get_alert(conn, alert_id)
    assert found is not None
    return found


def series(store: Store, settings: Settings, a: str, b: str, measure: str, *,
           start: dt.date | None = None, end: dt.date | None = None) -> pd.DataFrame:
    """One pair's measure from the store: date, value, band low/high and n per day."""
    symbols = universe(store, settings)
    label = canonical_pair(settings, symbols, f"{a}/{b}")
    spec = parse_measure(measure)
    returns = read_returns(store, settings, [a, b], None, end)
    if returns.empty:
        raise ComoveError(f"no returns for {label}: ingest closes first")
    frame = api.correlations(returns, spec.text, pairs=[(a, b)],
                             level=settings.correlation.level, start=start)
    frame = frame.drop(columns=["pair", "stale"])
    frame["date"] = [day.date() for day in frame["date"]]
    frame.insert(1, "measure", spec.text)
    return frame.reset_index(drop=True)
