"""Alerts, their events, acknowledgements, mutes and the saved evaluation state.

An alert is keyed by (rule, target, opened_on): a rerun over the same days finds the same
row, so its id, and the acknowledgements hanging from it, survive any backfill.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

from sqlalchemy import Connection, and_, bindparam, delete, func, or_, select, update

from storage.schema import acknowledgements, alert_events, alerts, evaluation_state, mutes

RETRACTED = "retracted"
"""The state of an alert a rerun over the same days no longer produces, kept because it was
acknowledged or already announced in an evening's digest (older stores said "withdrawn")."""


STORED_STATES = {"withdrawn": RETRACTED}
"""Words earlier versions wrote in ``alerts.state``, read as today's word."""
RETRACTED_WORDS = (RETRACTED, "withdrawn")

STORED_KINDS = {"basket": "group-average"}
"""Rule kinds earlier versions wrote in ``alerts.rule_kind``, read as today's word."""


def _num(value: float | None) -> float | None:
    """NaN is stored as NULL: neither SQLite nor PostgreSQL round-trip it the same way."""
    if value is None:
        return None
    value = float(value)
    return None if math.isnan(value) else value


class EventLike(Protocol):
    """What storing an event reads; monitor.alerts.AlertEvent has exactly these names, so
    the evaluation hands its events over as they are (no copy per event)."""

    @property
    def rule(self) -> str: ...
    @property
    def target(self) -> str: ...
    @property
    def opened(self) -> dt.date: ...
    @property
    def first_breach(self) -> dt.date: ...
    @property
    def rule_kind(self) -> str: ...
    @property
    def severity(self) -> str: ...
    @property
    def event(self) -> str: ...
    @property
    def date(self) -> dt.date: ...
    @property
    def value(self) -> float: ...
    @property
    def level(self) -> float: ...
    @property
    def low(self) -> float: ...
    @property
    def high(self) -> float: ...
    @property
    def n(self) -> float: ...
    @property
    def z(self) -> float: ...
    @property
    def p(self) -> float: ...
    @property
    def reference(self) -> float: ...
    @property
    def peak_value(self) -> float: ...
    @property
    def peak_date(self) -> dt.date: ...
    @property
    def days_held(self) -> int: ...
    @property
    def announce(self) -> bool: ...


@dataclass(frozen=True)
class EventRow:
    """An event made outside the alert book (the data-feed alert), shaped as EventLike."""

    rule: str
    target: str
    opened: dt.date
    first_breach: dt.date
    rule_kind: str
    severity: str
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
    peak_date: dt.date
    days_held: int
    announce: bool


def delete_events_on(conn: Connection, rules: Sequence[str], date: dt.date) -> set[int]:
    """Remove the events of `rules` dated `date`; returns the alert ids they belonged to."""
    return delete_events_between(conn, rules, date, date)


def delete_events_between(conn: Connection, rules: Sequence[str], first: dt.date,
                          last: dt.date) -> set[int]:
    """Remove the events of `rules` dated `first` to `last`; returns their alert ids."""
    where = and_(alert_events.c.rule.in_(list(rules)), alert_events.c.date >= first,
                 alert_events.c.date <= last)
    ids = set(conn.execute(select(alert_events.c.alert_id).where(where)).scalars())
    if ids:
        conn.execute(delete(alert_events).where(where))
    return ids


def write_events(conn: Connection, events: Iterable[EventLike],
                 measures: Mapping[str, str] | None = None) -> set[int]:
    """Insert events in bulk, creating each alert row the first time its key is seen;
    `measures` gives each rule's measure text for new alert rows."""
    rows = list(events)
    measures = measures or {}
    if not rows:
        return set()
    keys = {(e.rule, e.target, e.opened) for e in rows}
    ids = _alert_ids(conn, keys)
    fresh: dict[tuple[str, str, dt.date], EventLike] = {}
    for e in rows:
        key = (e.rule, e.target, e.opened)
        if key not in ids and key not in fresh:
            fresh[key] = e
    if fresh:
        _many(conn, alerts.insert(), [
            {"rule": e.rule, "target": e.target, "opened_on": e.opened,
             "first_breach_on": e.first_breach, "rule_kind": e.rule_kind,
             "severity": e.severity, "measure": measures.get(e.rule, ""), "state": "open",
             "level": _num(e.level), "opened_value": _num(e.value), "announced": e.announce}
            for e in fresh.values()
        ], "INSERT INTO alerts (rule, target, opened_on, first_breach_on, rule_kind, severity, "
           "measure, state, level, opened_value, announced) VALUES (?,?,?,?,?,?,?,?,?,?,?)")
        ids.update(_alert_ids(conn, set(fresh)))
    _insert_events(conn, ids, rows)
    latest: dict[int, EventLike] = {}
    for e in rows:
        alert_id = ids[(e.rule, e.target, e.opened)]
        if alert_id not in latest or e.date >= latest[alert_id].date:
            latest[alert_id] = e
    _many(
        conn,
        alerts.update().where(alerts.c.id == bindparam("b_id")).values(
            peak_value=bindparam("b_peak"), peak_on=bindparam("b_peak_on"),
            last_value=bindparam("b_last"), last_on=bindparam("b_last_on")),
        [{"b_peak": _num(e.peak_value), "b_peak_on": e.peak_date, "b_last": _num(e.value),
          "b_last_on": e.date, "b_id": alert_id} for alert_id, e in latest.items()],
        "UPDATE alerts SET peak_value = ?, peak_on = ?, last_value = ?, last_on = ? "
        "WHERE id = ?",
    )
    return set(latest)


def _sqlite(value: object) -> object:
    if isinstance(value, bool):
        return int(value)
    if isinstance(value, dt.date):
        return value.isoformat()
    return value


def _many(conn: Connection, statement: Any, rows: list[dict[str, Any]], sqlite_sql: str
          ) -> None:
    """executemany of `statement`; on SQLite the same statement written out (`sqlite_sql`,
    its ? in the order of each row's keys) goes straight to the driver, in the text and
    integer forms SQLAlchemy's Date and Boolean types store there, because SQLAlchemy's
    per-row parameter processing costs more than SQLite's own work for a busy backfill."""
    if not rows:
        return
    if conn.dialect.name == "sqlite":
        conn.exec_driver_sql(sqlite_sql, [tuple(_sqlite(v) for v in row.values())
                                          for row in rows])
    else:
        conn.execute(statement, rows)


_EVENT_COLUMNS = ("alert_id", "rule", "date", "event", "value", "level", "low", "high", "n",
                  "z", "p", "reference", "days_held", "announce")


def _insert_events(conn: Connection, ids: dict[tuple[str, str, dt.date], int],
                   rows: Sequence[EventLike]) -> None:
    values = [
        (ids[(e.rule, e.target, e.opened)], e.rule, e.date, e.event, _num(e.value),
         _num(e.level), _num(e.low), _num(e.high), _num(e.n), _num(e.z), _num(e.p),
         _num(e.reference), e.days_held, e.announce)
        for e in rows
    ]
    if conn.dialect.name == "sqlite":
        # Straight to the driver, in the text and integer forms SQLAlchemy's Date and
        # Boolean types store on SQLite: a busy backfill writes hundreds of thousands of
        # events and the per-row parameter processing would cost more than the insert.
        marks = ", ".join("?" * len(_EVENT_COLUMNS))
        conn.exec_driver_sql(
            f"INSERT INTO alert_events ({', '.join(_EVENT_COLUMNS)}) VALUES ({marks})",
            [(*v[:2], v[2].isoformat(), *v[3:13], int(v[13])) for v in values],
        )
        return
    conn.execute(alert_events.insert(), [dict(zip(_EVENT_COLUMNS, v, strict=True))
                                         for v in values])


def _alert_ids(conn: Connection, keys: set[tuple[str, str, dt.date]]
               ) -> dict[tuple[str, str, dt.date], int]:
    if not keys:
        return {}
    rules = sorted({k[0] for k in keys})
    first = min(k[2] for k in keys)
    found = conn.execute(
        select(alerts.c.id, alerts.c.rule, alerts.c.target, alerts.c.opened_on)
        .where(alerts.c.rule.in_(rules), alerts.c.opened_on >= first)
    ).all()
    return {(r.rule, r.target, r.opened_on): int(r.id) for r in found
            if (r.rule, r.target, r.opened_on) in keys}


def update_open_alerts(
    conn: Connection,
    rows: Sequence[tuple[str, str, dt.date, float, dt.date, float, dt.date]],
) -> None:
    """Keep open alerts' peak and latest value current between their events: rows of
    (rule, target, opened_on, peak_value, peak_on, last_value, last_on)."""
    if not rows:
        return
    _many(
        conn,
        alerts.update().where(alerts.c.rule == bindparam("b_rule"),
                              alerts.c.target == bindparam("b_target"),
                              alerts.c.opened_on == bindparam("b_opened"))
        .values(peak_value=bindparam("b_peak"), peak_on=bindparam("b_peak_on"),
                last_value=bindparam("b_last"), last_on=bindparam("b_last_on")),
        [{"b_peak": _num(pv), "b_peak_on": po, "b_last": _num(lv), "b_last_on": lo,
          "b_rule": r, "b_target": t, "b_opened": o} for r, t, o, pv, po, lv, lo in rows],
        "UPDATE alerts SET peak_value = ?, peak_on = ?, last_value = ?, last_on = ? "
        "WHERE rule = ? AND target = ? AND opened_on = ?",
    )


@dataclass(frozen=True)
class Retraction:
    """Why a rerun no longer produces an alert: recorded on every alert it retracts."""

    on: dt.date
    reason: str
    batch: int | None = None


def digest_days(conn: Connection) -> list[dt.date]:
    """The days an evening's digest was made for (a done daily run) or sent, ascending."""
    from storage.schema import outbox, runs

    daily = conn.execute(select(runs.c.as_of).where(runs.c.kind == "daily",
                                                    runs.c.status == "done")).scalars()
    sent = conn.execute(select(outbox.c.as_of).where(
        outbox.c.status.in_(["sent", "maybe sent"]))).scalars()
    return sorted(set(daily) | set(sent))


def _was_shown(opened: dt.date, cleared: dt.date | None, days: Sequence[dt.date]) -> bool:
    """Whether the alert was open on a day whose digest was made (so a reader saw it)."""
    import bisect

    k = bisect.bisect_left(days, opened)
    return k < len(days) and (cleared is None or days[k] <= cleared)


def refresh_states(conn: Connection, alert_ids: Iterable[int],
                   retraction: Retraction | None = None) -> None:
    """Derive each alert's state from its events: cleared when a cleared event exists,
    open while its opened event exists, otherwise retracted when it was acknowledged or
    announced (open on a day an evening's digest was made for), with `retraction`'s day,
    reason and batch; an alert nobody saw and nothing refers to is deleted."""
    wanted = sorted(set(alert_ids))
    shown_days: list[dt.date] | None = None
    why = retraction or Retraction(on=dt.datetime.now(dt.UTC).date(),
                                   reason="a rerun over the same days no longer produces it")
    for chunk in (wanted[i:i + 500] for i in range(0, len(wanted), 500)):
        kinds: dict[int, dict[str, dt.date]] = {alert_id: {} for alert_id in chunk}
        for alert_id, event, first in conn.execute(
            select(alert_events.c.alert_id, alert_events.c.event, func.min(alert_events.c.date))
            .where(alert_events.c.alert_id.in_(chunk))
            .group_by(alert_events.c.alert_id, alert_events.c.event)
        ).all():
            kinds[alert_id][event] = first
        acked = set(conn.execute(select(acknowledgements.c.alert_id)
                                 .where(acknowledgements.c.alert_id.in_(chunk))).scalars())
        orphans = [alert_id for alert_id, seen in kinds.items()
                   if "cleared" not in seen and "opened" not in seen]
        rows = {}
        if orphans:
            rows = {r.id: r for r in conn.execute(
                select(alerts.c.id, alerts.c.opened_on, alerts.c.cleared_on, alerts.c.state,
                       alerts.c.announced, alerts.c.retracted_on)
                .where(alerts.c.id.in_(orphans))).all()}
        updates = []
        retracted = []
        gone = []
        for alert_id, seen in kinds.items():
            if "cleared" in seen:
                updates.append({"b_id": alert_id, "b_state": "cleared",
                                "b_cleared": seen["cleared"]})
            elif "opened" in seen:
                updates.append({"b_id": alert_id, "b_state": "open", "b_cleared": None})
            else:
                row = rows.get(alert_id)
                if row is not None and row.state in (RETRACTED, "withdrawn"):
                    continue  # already retracted: keep the first day and reason
                if shown_days is None and row is not None and row.announced:
                    shown_days = digest_days(conn)
                if alert_id in acked or (row is not None and row.announced and _was_shown(
                        row.opened_on, row.cleared_on, shown_days or [])):
                    retracted.append({"b_id": alert_id})
                else:
                    gone.append(alert_id)
        _many(conn, alerts.update().where(alerts.c.id == bindparam("b_id")).values(
            state=bindparam("b_state"), cleared_on=bindparam("b_cleared"), retracted_on=None,
            retracted_reason=None, retracted_batch=None),
            [{"b_state": u["b_state"], "b_cleared": u["b_cleared"], "b_id": u["b_id"]}
             for u in updates],
            "UPDATE alerts SET state = ?, cleared_on = ?, retracted_on = NULL, "
            "retracted_reason = NULL, retracted_batch = NULL WHERE id = ?")
        if retracted:
            conn.execute(alerts.update().where(alerts.c.id.in_([r["b_id"] for r in retracted]))
                         .values(state=RETRACTED, cleared_on=None, retracted_on=why.on,
                                 retracted_reason=why.reason[:2000],
                                 retracted_batch=why.batch))
        if gone:
            conn.execute(delete(alert_events).where(alert_events.c.alert_id.in_(gone)))
            conn.execute(delete(alerts).where(alerts.c.id.in_(gone)))


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
    retracted_on: dt.date | None = None
    retracted_reason: str | None = None
    retracted_batch: int | None = None
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
    open_on: dt.date | None = None,
) -> list[AlertRow]:
    """Alerts with their latest acknowledgement, newest first.

    `open_on` keeps the alerts that were open on that day or cleared on it (what an
    evening's digest of that day shows), whatever happened to them later.
    """
    query = select(alerts)
    if open_on is not None:
        query = query.where(alerts.c.opened_on <= open_on,
                            alerts.c.state.not_in([RETRACTED, "withdrawn"]),
                            or_(alerts.c.cleared_on.is_(None), alerts.c.cleared_on >= open_on))
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
        values = dict(r._mapping)
        values["state"] = STORED_STATES.get(values["state"], values["state"])
        values["rule_kind"] = STORED_KINDS.get(values["rule_kind"], values["rule_kind"])
        out.append(AlertRow(**values, acknowledged_by=ack["by"] if ack else None,
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


def get_mute(conn: Connection, mute_id: int) -> dict[str, Any] | None:
    row = conn.execute(select(mutes).where(mutes.c.id == mute_id)).first()
    return None if row is None else dict(row._mapping)


def end_mute(conn: Connection, mute_id: int, until: dt.date) -> None:
    """Make `until` the mute's last day (its earlier days stay muted in the history)."""
    conn.execute(update(mutes).where(mutes.c.id == mute_id).values(until=until))


def delete_mute(conn: Connection, mute_id: int) -> None:
    conn.execute(delete(mutes).where(mutes.c.id == mute_id))


def remove_acknowledgements(conn: Connection, alert_id: int) -> list[dict[str, Any]]:
    """Delete every acknowledgement of an alert; return what was removed."""
    removed = list_acknowledgements(conn, [alert_id])
    conn.execute(delete(acknowledgements).where(acknowledgements.c.alert_id == alert_id))
    return removed


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
