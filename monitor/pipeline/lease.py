"""The evaluation lease: a daily run and a shell backfill never evaluate at once."""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager

from monitor.errors import LeaseHeld
from storage import Store
from storage import runs as runs_store

LEASE_NAME = "evaluation"
"""One lease for everything that evaluates: the daily run and shell backfills."""


LEASE_TTL = dt.timedelta(minutes=30)


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
