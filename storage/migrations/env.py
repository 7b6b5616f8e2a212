"""Alembic's environment for comove's store: always run on the connection the caller opened
(`storage.migrate.upgrade`), inside the caller's transaction, never from a URL of its own."""

from __future__ import annotations

from alembic import context

from storage.schema import metadata

connection = context.config.attributes["connection"]
# render_as_batch: SQLite alters most columns by copying the table (Alembic's batch mode).
context.configure(connection=connection, target_metadata=metadata, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
