"""Schema migrations with Alembic: a store made by an earlier comove is upgraded in place,
keeping its closes, alerts, acknowledgements and mutes.

The revisions are in `storage/migrations/versions/` (one per schema version; see
DEVELOPERS.md, "Store"). Alembic always runs on the caller's connection, inside the
caller's transaction, so an upgrade is all-or-nothing on both backends (SQLite and
PostgreSQL both have transactional DDL). A store created before migrations existed has
no `alembic_version` table: it is stamped with revision 0001 (schema version 1) first.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import Connection

if TYPE_CHECKING:
    from alembic.config import Config

MIGRATIONS = Path(__file__).with_name("migrations")

REVISION_OF_VERSION = {1: "0001", 2: "0002"}
"""The Alembic revision that brings a store to each `schema_version`."""


def _config(conn: Connection) -> Config:
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS).replace("%", "%%"))
    config.attributes["connection"] = conn
    return config


def current_revision(conn: Connection) -> str | None:
    """The store's Alembic revision; None when it was never stamped."""
    from alembic.runtime.migration import MigrationContext

    return MigrationContext.configure(conn).get_current_revision()


def head_revision() -> str:
    from alembic.script import ScriptDirectory

    head = ScriptDirectory(str(MIGRATIONS)).get_current_head()
    assert head is not None
    return head


def stamp_head(conn: Connection) -> None:
    """Mark a store just created from `storage.schema` as at the newest revision."""
    from alembic import command

    command.stamp(_config(conn), "head")


def upgrade(conn: Connection, found_version: int) -> None:
    """Bring a store at schema version `found_version` to the newest revision."""
    from alembic import command

    config = _config(conn)
    if current_revision(conn) is None:
        command.stamp(config, REVISION_OF_VERSION[found_version])
    command.upgrade(config, "head")
