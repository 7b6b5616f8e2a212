"""The digest outbox: a rendered digest is stored before any attempt to send it.

One row per rendered digest. Status moves pending -> sent, or pending -> failed -> sent on
a later retry; `superseded` marks an older row for the same date when a digest is
re-rendered for `--resend` or after a restatement. `maybe sent` records a send whose
connection dropped after the server took the whole message: the server may have delivered
it, so it counts as sent. A date whose digest was sent (or maybe sent) is never sent again
unless the caller asks for it explicitly.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from sqlalchemy import Connection, select

from storage.schema import outbox

MAYBE_SENT = "maybe sent"


@dataclass(frozen=True)
class OutboxRow:
    id: int
    as_of: dt.date
    subject: str
    recipients: str
    folder: str
    message: bytes
    status: str
    attempts: int
    last_error: str
    created_at: dt.datetime
    sent_at: dt.datetime | None


def add(conn: Connection, *, as_of: dt.date, subject: str, recipients: list[str], folder: str,
        message: bytes, now: dt.datetime) -> int:
    """Store a rendered digest as pending; earlier unsent rows for the date are superseded."""
    conn.execute(outbox.update().where(outbox.c.as_of == as_of,
                                       outbox.c.status.in_(["pending", "failed"]))
                 .values(status="superseded"))
    result = conn.execute(outbox.insert().values(
        as_of=as_of, subject=subject, recipients=", ".join(recipients), folder=folder,
        message=message, status="pending", attempts=0, last_error="", created_at=now))
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


def for_date(conn: Connection, as_of: dt.date) -> list[OutboxRow]:
    rows = conn.execute(select(outbox).where(outbox.c.as_of == as_of)
                        .order_by(outbox.c.id)).all()
    return [OutboxRow(**r._mapping) for r in rows]


def unsent(conn: Connection) -> list[OutboxRow]:
    """Digests waiting to go out (pending or failed), oldest first."""
    rows = conn.execute(select(outbox).where(outbox.c.status.in_(["pending", "failed"]))
                        .order_by(outbox.c.as_of, outbox.c.id)).all()
    return [OutboxRow(**r._mapping) for r in rows]


def get(conn: Connection, outbox_id: int) -> OutboxRow | None:
    row = conn.execute(select(outbox).where(outbox.c.id == outbox_id)).first()
    return OutboxRow(**row._mapping) if row else None


def mark_sent(conn: Connection, outbox_id: int, *, attempts: int, now: dt.datetime) -> None:
    conn.execute(outbox.update().where(outbox.c.id == outbox_id).values(
        status="sent", attempts=outbox.c.attempts + attempts, sent_at=now, last_error=""))


def mark_failed(conn: Connection, outbox_id: int, *, attempts: int, error: str) -> None:
    conn.execute(outbox.update().where(outbox.c.id == outbox_id).values(
        status="failed", attempts=outbox.c.attempts + attempts, last_error=error[:2000]))


def mark_maybe_sent(conn: Connection, outbox_id: int, *, attempts: int, error: str,
                    now: dt.datetime) -> None:
    conn.execute(outbox.update().where(outbox.c.id == outbox_id).values(
        status=MAYBE_SENT, attempts=outbox.c.attempts + attempts, sent_at=now,
        last_error=error[:2000]))


def sent_for(conn: Connection, as_of: dt.date) -> OutboxRow | None:
    """The date's digest that went out (sent or maybe sent), the latest one."""
    rows = [r for r in for_date(conn, as_of) if r.status in ("sent", MAYBE_SENT)]
    return rows[-1] if rows else None
