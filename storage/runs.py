"""The runs ledger and the lease that keeps two processes off the same work."""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, delete, select

from storage.schema import leases, runs


def start_run(conn: Connection, *, kind: str, as_of: dt.date, range_start: dt.date | None,
              params_hash: str, now: dt.datetime) -> int:
    result = conn.execute(runs.insert().values(
        kind=kind, as_of=as_of, range_start=range_start, status="running", started_at=now,
        params_hash=params_hash, counts="{}", error=""))
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


def finish_run(conn: Connection, run_id: int, *, status: str, now: dt.datetime,
               counts: dict[str, Any] | None = None, error: str = "") -> None:
    conn.execute(runs.update().where(runs.c.id == run_id).values(
        status=status, finished_at=now, counts=json.dumps(counts or {}, default=str),
        error=error[:4000]))


def close_unfinished(conn: Connection, *, now: dt.datetime) -> int:
    """Mark runs still 'running' as interrupted (call only while holding the lease)."""
    result = conn.execute(runs.update().where(runs.c.status == "running").values(
        status="interrupted", finished_at=now,
        error="the process ended before the run finished"))
    return int(result.rowcount or 0)


@dataclass(frozen=True)
class RunRow:
    id: int
    kind: str
    as_of: dt.date
    range_start: dt.date | None
    status: str
    started_at: dt.datetime
    finished_at: dt.datetime | None
    params_hash: str
    counts: dict[str, Any]
    error: str

    @property
    def seconds(self) -> float | None:
        if self.finished_at is None:
            return None
        return (_aware(self.finished_at) - _aware(self.started_at)).total_seconds()


def _aware(moment: dt.datetime) -> dt.datetime:
    # SQLite hands timezone-aware values back naive; they were written in UTC.
    return moment if moment.tzinfo else moment.replace(tzinfo=dt.UTC)


def list_runs(conn: Connection, *, kind: str | None = None, as_of: dt.date | None = None,
              status: str | None = None) -> list[RunRow]:
    query = select(runs).order_by(runs.c.id)
    if kind is not None:
        query = query.where(runs.c.kind == kind)
    if as_of is not None:
        query = query.where(runs.c.as_of == as_of)
    if status is not None:
        query = query.where(runs.c.status == status)
    out = []
    for r in conn.execute(query).all():
        values = dict(r._mapping)
        values["counts"] = json.loads(values["counts"] or "{}")
        out.append(RunRow(**values))
    return out


@dataclass(frozen=True)
class Lease:
    name: str
    owner: str
    expires: dt.datetime


def take_lease(conn: Connection, name: str, owner: str, *, now: dt.datetime,
               ttl: dt.timedelta) -> Lease | None:
    """Take the named lease for `owner`, or return the holder's lease when someone else
    holds an unexpired one. An expired lease left by a dead process is taken over. Call
    inside a transaction that serialises writers (SQLite's write lock, or PostgreSQL's row
    lock taken here with FOR UPDATE)."""
    row = conn.execute(select(leases).where(leases.c.name == name).with_for_update()).first()
    if row is not None and row.owner != owner and _aware(row.expires) > now:
        return Lease(row.name, row.owner, _aware(row.expires))
    if row is None:
        conn.execute(leases.insert().values(name=name, owner=owner, heartbeat=now,
                                            expires=now + ttl))
    else:
        conn.execute(leases.update().where(leases.c.name == name).values(
            owner=owner, heartbeat=now, expires=now + ttl))
    return None


def renew_lease(conn: Connection, name: str, owner: str, *, now: dt.datetime,
                ttl: dt.timedelta) -> bool:
    updated = conn.execute(leases.update().where(leases.c.name == name, leases.c.owner == owner)
                           .values(heartbeat=now, expires=now + ttl))
    return bool(updated.rowcount)


def release_lease(conn: Connection, name: str, owner: str) -> None:
    conn.execute(delete(leases).where(leases.c.name == name, leases.c.owner == owner))
