"""Opening the store: the engine factory, SQLite pragmas and the schema-version check."""

from __future__ import annotations

import datetime as dt
import logging
import sqlite3
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, Engine, create_engine, event, func, inspect, select, text
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, OperationalError, SQLAlchemyError

from storage.schema import metadata, schema_version

SCHEMA_VERSION = 2
"""Bumped whenever a table changes, with an Alembic revision in storage/migrations that
brings an older store to it (`comove init` runs it); an older store is refused at open
with that advice, a newer one with the advice to upgrade comove."""

SQLITE_BUSY_TIMEOUT_MS = 30_000


class StoreError(Exception):
    """The store cannot be opened, is not initialised, or is at another schema version."""


LOG = logging.getLogger("comove.store")

DEFAULT_BUSY_TIMEOUT = SQLITE_BUSY_TIMEOUT_MS / 1000
"""Seconds a writer waits for another writer before it gives up (settings: store.busy_timeout)."""

PG_WRITER_LOCK = 0x636F6D6F7665
"""The PostgreSQL advisory lock every comove write transaction takes (one writer at a time,
as on SQLite): two ingests never race on the same closes."""

_POLL_SECONDS = 0.1


@dataclass
class Store:
    """An open store: the SQLAlchemy engine plus the URL it was opened from (password hidden)."""

    engine: Engine
    url: str
    busy_timeout: float = DEFAULT_BUSY_TIMEOUT

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    @contextmanager
    def begin(self, *, immediate: bool = True) -> Iterator[Connection]:
        """One write transaction: everything inside commits together or not at all.

        It starts by taking the store's writer lock (SQLite BEGIN IMMEDIATE, a PostgreSQL
        advisory lock), waiting up to `busy_timeout` seconds for another writer, with one
        progress line when it has to wait, then StoreError in one line. A deferred
        transaction that reads and then writes could otherwise fail at once with "database
        is locked" when another process committed in between. `immediate=False` is for a
        read-only transaction.
        """
        try:
            with self.engine.connect() as conn:
                if immediate:
                    conn = conn.execution_options(comove_immediate=True,
                                                  comove_wait=self.busy_timeout)
                with conn.begin():
                    if immediate and not self.is_sqlite:
                        self._pg_writer_lock(conn)
                    yield conn
        except OperationalError as exc:
            raise StoreError(f"store {self.url}: {_first_line(exc)}") from None

    @contextmanager
    def connect(self) -> Iterator[Connection]:
        try:
            with self.engine.connect() as conn:
                yield conn
        except OperationalError as exc:
            raise StoreError(f"store {self.url}: {_first_line(exc)}") from None

    def dispose(self) -> None:
        self.engine.dispose()

    def _pg_writer_lock(self, conn: Connection) -> None:
        def attempt() -> bool:
            query = text("SELECT pg_try_advisory_xact_lock(:key)")
            return bool(conn.execute(query, {"key": PG_WRITER_LOCK}).scalar())

        wait_for_writer(attempt, self.url, self.busy_timeout)


def wait_for_writer(attempt: Callable[[], bool], url: str, wait: float) -> None:
    """Call `attempt` until it takes the lock; one progress line, then StoreError at `wait`."""
    deadline = time.monotonic() + wait
    waited = False
    while not attempt():
        if time.monotonic() >= deadline:
            raise StoreError(
                f"store {url} is locked by another writer (an ingest, a run or a backfill); "
                f"gave up after {wait:g} s: try again when it has finished"
            )
        if not waited:
            LOG.warning("store %s is busy with another writer; waiting up to %g s", url, wait)
            waited = True
        time.sleep(_POLL_SECONDS)
    if waited:
        LOG.info("store lock taken; continuing")


def _first_line(exc: DBAPIError) -> str:
    """The driver's message without SQLAlchemy's statement and parameter dump."""
    text_ = str(exc.orig).strip() if exc.orig is not None else str(exc)
    return text_.splitlines()[0] if text_ else type(exc).__name__


def _sqlite_engine(url: str) -> Engine:
    engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})
    shown = make_url(url).render_as_string(hide_password=True)

    # pysqlite's own transaction handling defers BEGIN and skips it for some statements;
    # taking control makes every engine.begin() block one real SQLite transaction.
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection) -> None:
        options = conn.get_execution_options()
        if not options.get("comove_immediate", False):
            conn.exec_driver_sql("BEGIN")
            return
        dbapi_conn = conn.connection.dbapi_connection
        assert dbapi_conn is not None

        def attempt() -> bool:
            # A short busy handler per attempt, so the wait can be reported and bounded.
            cur = dbapi_conn.cursor()
            try:
                cur.execute(f"PRAGMA busy_timeout={int(_POLL_SECONDS * 1000)}")
                cur.execute("BEGIN IMMEDIATE")
                return True
            except sqlite3.OperationalError as exc:
                if "locked" in str(exc) or "busy" in str(exc):
                    return False
                raise
            finally:
                cur.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
                cur.close()

        wait_for_writer(attempt, shown, float(options.get("comove_wait", DEFAULT_BUSY_TIMEOUT)))

    return engine


def make_engine(url: str) -> Engine:
    """An engine for a SQLAlchemy URL; SQLite gets WAL, a busy timeout and foreign keys."""
    try:
        parsed = make_url(url)
    except ArgumentError as exc:
        raise StoreError(f"store url {url!r} is not a SQLAlchemy URL: {exc}") from None
    if parsed.get_backend_name() == "sqlite":
        return _sqlite_engine(url)
    if parsed.get_backend_name() == "postgresql" and parsed.drivername == "postgresql":
        url = parsed.set(drivername="postgresql+psycopg").render_as_string(hide_password=False)
    try:
        return create_engine(url, pool_pre_ping=True)
    except (ArgumentError, ImportError) as exc:
        raise StoreError(f"store url {parsed!r}: {exc}") from None


def open_store(url: str, *, create: bool = False,
               busy_timeout: float = DEFAULT_BUSY_TIMEOUT) -> Store:
    """Open the store at `url`; with `create`, make the tables first (idempotent).

    Raises StoreError when the database cannot be reached, has no comove tables (and
    `create` is false) or is at a schema version other than SCHEMA_VERSION.
    """
    engine = make_engine(url)
    shown = make_url(url).render_as_string(hide_password=True)
    try:
        if create:
            with engine.begin() as conn:
                _create_or_upgrade(conn)
        with engine.connect() as conn:
            initialised = inspect(conn).has_table("schema_version")
            found = (conn.execute(select(func.max(schema_version.c.version))).scalar()
                     if initialised else None)
    except OperationalError as exc:
        engine.dispose()
        reason = str(exc.orig).strip().splitlines()[0] if exc.orig else str(exc)
        raise StoreError(f"cannot open store {shown}: {reason}") from None
    except SQLAlchemyError as exc:
        engine.dispose()
        raise StoreError(f"cannot open store {shown}: {exc}") from None
    if not initialised:
        engine.dispose()
        raise StoreError(f"store {shown} is not initialised: run `comove init` first")
    if found is not None and found < SCHEMA_VERSION:
        engine.dispose()
        raise StoreError(
            f"store {shown} is at schema version {found}, this comove needs {SCHEMA_VERSION}: "
            "back it up, then run `comove init` to upgrade it in place (closes, alerts and "
            "acknowledgements are kept)"
        )
    if found != SCHEMA_VERSION:
        engine.dispose()
        raise StoreError(
            f"store {shown} is at schema version {found}, this comove knows up to "
            f"{SCHEMA_VERSION}: it was written by a newer comove; upgrade comove"
        )
    return Store(engine=engine, url=shown, busy_timeout=busy_timeout)


def _create_or_upgrade(conn: Connection) -> None:
    """A new store gets every table and the newest revision; an older one is upgraded by
    its migrations (all in the caller's transaction)."""
    from storage import migrate

    if not inspect(conn).has_table("schema_version"):
        metadata.create_all(conn)
        conn.execute(schema_version.insert().values(version=SCHEMA_VERSION,
                                                    applied_at=dt.datetime.now(dt.UTC)))
        migrate.stamp_head(conn)
        return
    found = conn.execute(select(func.max(schema_version.c.version))).scalar()
    if found is None:  # the table exists but was never filled: a store cut off at creation
        metadata.create_all(conn)
        conn.execute(schema_version.insert().values(version=SCHEMA_VERSION,
                                                    applied_at=dt.datetime.now(dt.UTC)))
        migrate.stamp_head(conn)
    elif found < SCHEMA_VERSION:
        migrate.upgrade(conn, int(found))
    elif migrate.current_revision(conn) is None:
        migrate.stamp_head(conn)
