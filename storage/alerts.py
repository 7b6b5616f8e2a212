"""Alerts, their events, acknowledgements, mutes and the saved evaluation state.

An alert is keyed by (rule, target, opened_on): a rerun over the same days finds the same
row, so its id, and the acknowledgements hanging from it, survive any backfill.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, and_, delete, func, or_, select

from storage.schema import acknowledgements, alert_events, alerts, evaluation_state, mutes


def _num(value: float | None) -> float | None:
    """NaN is stored as NULL: neither SQLite nor PostgreSQL round-trip it the same way."""
    if value is None:
        return None
    value = float(value)
    return None if math.isnan(value) else value


@dataclass(frozen=True)
class EventRow:
    """One event to store; mirrors monitor.alerts.AlertEvent plus the measure text."""

    rule: str
    target: str
    opened_on: dt.date
    first_breach_on: dt.date
    rule_kind: str
    severity: str
    measure: str
    event: str
    date: dt.date
    value: float
    level: float
    low: float
    high: float
    n: float
    z: float
    p: float
    reference: float
    peak_value: float
    peak_on: dt.date
    days_held: int
    announce: bool


def delete_events_on(conn: Connection, rules: Sequence[str], date: dt.date) -> set[int]:
    """Remove the events of `rules` dated `date`; returns the alert ids they belonged to."""
    ids = set(conn.execute(
        select(alert_events.c.alert_id).where(alert_events.c.rule.in_(list(rules)),
                                              alert_events.c.date == date)
    ).scalars())
    if ids:
        conn.execute(delete(alert_events).where(alert_events.c.rule.in_(list(rules)),
                                                alert_events.c.date == date))
    return ids


def _alert_id(conn: Connection, rule: str, target: str, opened_on: dt.date) -> int | None:
    return conn.execute(
        select(alerts.c.id).where(alerts.c.rule == rule, alerts.c.target == target,
                                  alerts.c.opened_on == opened_on)
    ).scalar()


def write_events(conn: Connection, events: Iterable[EventRow]) -> set[int]:
    """Insert events, creating each alert row the first time its key is seen."""
    touched: set[int] = set()
    for ev in events:
        alert_id = _alert_id(conn, ev.rule, ev.target, ev.opened_on)
        if alert_id is None:
            result = conn.execute(alerts.insert().values(
                rule=ev.rule, target=ev.target, opened_on=ev.opened_on,
                first_breach_on=ev.first_breach_on, rule_kind=ev.rule_kind,
                severity=ev.severity, measure=ev.measure, state="open",
                level=_num(ev.level), opened_value=_num(ev.value), announced=ev.announce,
            ))
            key = result.inserted_primary_key
            assert key is not None
            alert_id = int(key[0])
        conn.execute(alert_events.insert().values(
            alert_id=alert_id, rule=ev.rule, date=ev.date, event=ev.event, value=_num(ev.value),
            level=_num(ev.level), low=_num(ev.low), high=_num(ev.high), n=_num(ev.n),
            z=_num(ev.z), p=_num(ev.p), reference=_num(ev.reference), days_held=ev.days_held,
            announce=ev.announce,
        ))
        conn.execute(alerts.update().where(alerts.c.id == alert_id).values(
            peak_value=_num(ev.peak_value), peak_on=ev.peak_on, last_value=_num(ev.value),
            last_on=ev.date,
        ))
        touched.add(alert_id)
    return touched


def update_open_alert(conn: Connection, rule: str, target: str, opened_on: dt.date, *,
                      peak_value: float, peak_on: dt.date, last_value: float,
                      last_on: dt.date) -> None:
    """Keep an open alert's peak and latest value current between its events."""
    conn.execute(alerts.update().where(
        alerts.c.rule == rule, alerts.c.target == target, alerts.c.opened_on == opened_on
    ).values(peak_value=_num(peak_value), peak_on=peak_on, last_value=_num(last_value),
             last_on=last_on))


def refresh_states(conn: Connection, alert_ids: Iterable[int]) -> None:
    """Derive each alert's state from its events: cleared when a cleared event exists,
    open while its opened event exists, otherwise withdrawn (kept when acknowledged,
    deleted when nothing refers to it)."""
    for alert_id in sorted(set(alert_ids)):
        kinds = dict(conn.execute(
            select(alert_events.c.event, func.min(alert_events.c.date))
            .where(alert_events.c.alert_id == alert_id).group_by(alert_events.c.event)
        ).all())
        if "cleared" in kinds:
            values: dict[str, Any] = {"state": "cleared", "cleared_on": kinds["cleared"]}
        elif "opened" in kinds:
            values = {"state": "open", "cleared_on": None}
        else:
            acked = conn.execute(select(func.count()).select_from(acknowledgements)
                                 .where(acknowledgements.c.alert_id == alert_id)).scalar()
            if not acked:
                conn.execute(delete(alert_events).where(alert_events.c.alert_id == alert_id))
                conn.execute(delete(alerts).where(alerts.c.id == alert_id))
                continue
            values = {"state": "withdrawn", "cleared_on": None}
        conn.execute(alerts.update().where(alerts.c.id == alert_id).values(**values))


def withdraw_after(conn: Connection, rules: Sequence[str], date: dt.date) -> None:
    """Drop events of `rules` after `date` (a replay that stops at `date` owns them)."""
    ids = set(conn.execute(select(alert_events.c.alert_id).where(
        alert_events.c.rule.in_(list(rules)), alert_events.c.date > date)).scalars())
    if ids:
        conn.execute(delete(alert_events).where(alert_events.c.rule.in_(list(rules)),
                                                alert_events.c.date > date))
        refresh_states(conn, ids)


@dataclass(frozen=True)
class AlertRow:
    id: int
    rule: str
    target: str
    opened_on: dt.date
    first_breach_on: dt.date
    rule_kind: str
    severity: str
    measure: str
    state: str
    cleared_on: dt.date | None
    level: float | None
    opened_value: float | None
    peak_value: float | None
    peak_on: dt.date | None
    last_value: float | None
    last_on: dt.date | None
    announced: bool
    acknowledged_by: str | None = None
    acknowledged_at: dt.datetime | None = None
    acknowledged_note: str | None = None


def list_alerts(
    conn: Connection,
    *,
    open_only: bool = False,
    since: dt.date | None = None,
    target: str | None = None,
    rule: str | None = None,
    ids: Sequence[int] | None = None,
) -> list[AlertRow]:
    """Alerts with their latest acknowledgement, newest first."""
    query = select(alerts)
    if open_only:
        query = query.where(alerts.c.state == "open")
    if since is not None:
        query = query.where(or_(alerts.c.opened_on >= since, alerts.c.cleared_on >= since,
                                and_(alerts.c.state == "open", alerts.c.last_on >= since)))
    if target is not None:
        query = query.where(alerts.c.target == target)
    if rule is not None:
        query = query.where(alerts.c.rule == rule)
    if ids is not None:
        query = query.where(alerts.c.id.in_(list(ids)))
    rows = conn.execute(query.order_by(alerts.c.opened_on.desc(), alerts.c.id.desc())).all()
    latest = latest_acknowledgements(conn, [r.id for r in rows])
    out = []
    for r in rows:
        ack = latest.get(r.id)
        out.append(AlertRow(**r._mapping, acknowledged_by=ack["by"] if ack else None,
                            acknowledged_at=ack["at"] if ack else None,
                            acknowledged_note=ack["note"] if ack else None))
    return out


def latest_acknowledgements(conn: Connection, alert_ids: Sequence[int]) -> dict[int, Any]:
    if not alert_ids:
        return {}
    rows = conn.execute(
        select(acknowledgements).order_by(acknowledgements.c.id)
    ).all() if len(alert_ids) > 500 else conn.execute(
        select(acknowledgements).where(acknowledgements.c.alert_id.in_(list(alert_ids)))
        .order_by(acknowledgements.c.id)
    ).all()
    return {r.alert_id: dict(r._mapping) for r in rows}


def events_for(conn: Connection, alert_ids: Sequence[int] | None = None,
               *, date: dt.date | None = None) -> list[dict[str, Any]]:
    query = select(alert_events).order_by(alert_events.c.date, alert_events.c.id)
    if alert_ids is not None:
        query = query.where(alert_events.c.alert_id.in_(list(alert_ids)))
    if date is not None:
        query = query.where(alert_events.c.date == date)
    return [dict(r._mapping) for r in conn.execute(query).all()]


def get_alert(conn: Connection, alert_id: int) -> AlertRow | None:
    found = list_alerts(conn, ids=[alert_id])
    return found[0] if found else None


def acknowledge(conn: Connection, alert_id: int, *, by: str, note: str, at: dt.datetime,
                effective_on: dt.date) -> int:
    result = conn.execute(acknowledgements.insert().values(
        alert_id=alert_id, by=by, note=note, at=at, effective_on=effective_on))
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


def acknowledgement_index(conn: Connection) -> dict[tuple[str, str, dt.date], dt.date]:
    """(rule, target, opened_on) -> the first date an acknowledgement takes effect."""
    rows = conn.execute(
        select(alerts.c.rule, alerts.c.target, alerts.c.opened_on,
               func.min(acknowledgements.c.effective_on))
        .join(acknowledgements, acknowledgements.c.alert_id == alerts.c.id)
        .group_by(alerts.c.rule, alerts.c.target, alerts.c.opened_on)
    ).all()
    return {(r[0], r[1], r[2]): r[3] for r in rows}


def list_acknowledgements(conn: Connection, alert_ids: Sequence[int] | None = None
                          ) -> list[dict[str, Any]]:
    query = select(acknowledgements).order_by(acknowledgements.c.id)
    if alert_ids is not None:
        query = query.where(acknowledgements.c.alert_id.in_(list(alert_ids)))
    return [dict(r._mapping) for r in conn.execute(query).all()]


def add_mute(conn: Connection, *, rule: str | None, target: str | None, from_on: dt.date,
             until: dt.date, reason: str, now: dt.datetime) -> int:
    result = conn.execute(mutes.insert().values(rule=rule, target=target, from_on=from_on,
                                                until=until, reason=reason, created_at=now))
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


def list_mutes(conn: Connection) -> list[dict[str, Any]]:
    return [dict(r._mapping) for r in conn.execute(select(mutes).order_by(mutes.c.id)).all()]


@dataclass(frozen=True)
class SavedState:
    scope: str
    last_date: dt.date
    batch_watermark: int
    snapshot: dict[str, Any]


def load_state(conn: Connection, scope: str) -> SavedState | None:
    row = conn.execute(select(evaluation_state).where(evaluation_state.c.scope == scope)).first()
    if row is None:
        return None
    return SavedState(row.scope, row.last_date, row.batch_watermark, json.loads(row.snapshot))


def save_state(conn: Connection, state: SavedState, now: dt.datetime) -> None:
    values = {"last_date": state.last_date, "batch_watermark": state.batch_watermark,
              "snapshot": json.dumps(state.snapshot, separators=(",", ":")), "updated_at": now}
    updated = conn.execute(evaluation_state.update()
                           .where(evaluation_state.c.scope == state.scope).values(**values))
    if updated.rowcount == 0:
        conn.execute(evaluation_state.insert().values(scope=state.scope, **values))


def clear_state(conn: Connection, scope: str) -> None:
    conn.execute(delete(evaluation_state).where(evaluation_state.c.scope == scope))
