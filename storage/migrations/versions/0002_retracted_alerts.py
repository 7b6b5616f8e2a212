"""Schema version 2: an alert a rerun no longer produces is kept as `retracted` with why.

Adds `alerts.retracted_on`, `alerts.retracted_reason` and `alerts.retracted_batch` (the
ingest batch whose restatement removed the alert's condition), and rewrites the words
earlier versions stored: state `withdrawn` is now `retracted`, rule kind `basket` is now
`group-average`.

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import datetime as dt

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.add_column("alerts", sa.Column("retracted_on", sa.Date(), nullable=True))
    op.add_column("alerts", sa.Column("retracted_reason", sa.Text(), nullable=True))
    op.add_column("alerts", sa.Column("retracted_batch", sa.Integer(), nullable=True))
    alerts = sa.table("alerts", sa.column("state", sa.String), sa.column("rule_kind", sa.String))
    op.execute(alerts.update().where(alerts.c.state == "withdrawn").values(state="retracted"))
    op.execute(alerts.update().where(alerts.c.rule_kind == "basket")
               .values(rule_kind="group-average"))
    versions = sa.table("schema_version", sa.column("version", sa.Integer),
                        sa.column("applied_at", sa.DateTime(timezone=True)))
    op.execute(versions.insert().values(version=2, applied_at=dt.datetime.now(dt.UTC)))


def downgrade() -> None:
    raise NotImplementedError("comove stores are upgraded only; restore the backup instead")
