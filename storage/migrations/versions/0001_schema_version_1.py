"""The store as comove created it at schema version 1, before migrations existed.

Stores made then have every table of that version and no `alembic_version` table; opening
one for an upgrade stamps it with this revision (no change), then the later revisions run.
A new store is created from `storage.schema` and stamped with the head revision, so this
revision never creates tables itself.

Revision ID: 0001
Revises:
"""

from __future__ import annotations

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    pass


def downgrade() -> None:
    raise NotImplementedError("schema version 1 is the oldest comove store")
