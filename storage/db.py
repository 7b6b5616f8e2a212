"""Opening the store: the engine factory, SQLite pragmas and the schema-version check."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Connection, Engine, create_engine, event, func, inspect, select
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError, OperationalError, SQLAlchemyError

from storage.schema import metadata, schema_version

SCHEMA_VERSION = 2
"""Bumped whenever a table changes, with an Alembic revision in storage/migrations that
brings an older store to it (`comove init` runs it); an older store is refused at open
with that advice, a newer one with the advice to upgrade comove."""

SQLITE_BUSY_TIMEOUT_MS = 30_000


class StoreError(Exception):
    """The store cannot be opened, is not initialised, or is at another schema version."""


@dataclass
class Store:
    """An open store: the SQLAlchemy engine plus the URL it was opened from (password hidden)."""

    engine: Engine
    url: str

    @property
    def is_sqlite(self) -> bool:
        return self.engine.dialect.name == "sqlite"

    @contextmanager
    def begin(self, *, immediate: bool = False) -> Iterator[Connection]:
        """One transaction: everything inside commits together or not at all.

        `immediate` takes SQLite's write lock at the start (BEGIN IMMEDIATE), for a
        read-then-write that must not interleave with another process; PostgreSQL gets
        the same effect from the row locks the caller takes.
        """
        with self.engine.connect() as conn:
            if immediate:
                conn = conn.execution_options(comove_immediate=True)
            with conn.begin():
                yield conn

    @contextmanager
    def connect(self) -> Iterator[Connection]:
        with self.engine.connect() as conn:
            yield conn

    def dispose(self) -> None:
        self.engine.dispose()


def _sqlite_engine(url: str) -> Engine:
    engine = create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000})

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
        immediate = conn.get_execution_options().get("comove_immediate", False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")

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


def open_store(url: str, *, create: bool = False) -> Store:
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
    return Store(engine=engine, url=shown)


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
