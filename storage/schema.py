"""Every table of the store, declared once with SQLAlchemy Core.

Prices are the source of truth; correlations are derived and cheap to recompute, so the
store keeps closes (with every restatement audited), ingest batches, alerts and their
events, acknowledgements, mutes, the runs ledger and the digest outbox.
"""

from __future__ import annotations

from sqlalchemy import (
    Column,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData()

schema_version = Table(
    "schema_version",
    metadata,
    Column("version", Integer, primary_key=True),
    Column("applied_at", DateTime(timezone=True), nullable=False),
)

instruments = Table(
    "instruments",
    metadata,
    Column("symbol", String(64), primary_key=True),
    Column("name", String(200), nullable=False, default=""),
    Column("group_name", String(100), nullable=False, default=""),
    Column("currency", String(16), nullable=False, default=""),
    Column("calendar", String(200), nullable=False, default=""),
)

ingest_batches = Table(
    "ingest_batches",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("file_name", String(500), nullable=False),
    Column("sha256", String(64), nullable=False, index=True),
    Column("rows_read", Integer, nullable=False),
    Column("rows_accepted", Integer, nullable=False),
    Column("rows_rejected", Integer, nullable=False),
    Column("closes_new", Integer, nullable=False, default=0),
    Column("closes_restated", Integer, nullable=False, default=0),
    Column("earliest_restated", Date, nullable=True),
    Column("status", String(20), nullable=False),  # accepted | partial | rejected
    Column("problems", Text, nullable=False, default=""),  # one line per reject
    Column("ingested_at", DateTime(timezone=True), nullable=False),
)

closes = Table(
    "closes",
    metadata,
    Column("symbol", String(64), ForeignKey("instruments.symbol"), primary_key=True),
    Column("date", Date, primary_key=True),
    Column("close", Float, nullable=False),
    Column("source", String(200), nullable=False, default=""),
    Column("batch_id", Integer, ForeignKey("ingest_batches.id"), nullable=True),
)

close_revisions = Table(
    "close_revisions",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("symbol", String(64), ForeignKey("instruments.symbol"), nullable=False),
    Column("date", Date, nullable=False),
    Column("old_close", Float, nullable=False),
    Column("new_close", Float, nullable=False),
    Column("source_file", String(500), nullable=False),
    Column("batch_id", Integer, ForeignKey("ingest_batches.id"), nullable=False),
    Column("revised_at", DateTime(timezone=True), nullable=False),
)

suspect_ticks = Table(
    "suspect_ticks",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("symbol", String(64), ForeignKey("instruments.symbol"), nullable=False),
    Column("date", Date, nullable=False),
    Column("close", Float, nullable=False),
    Column("previous_close", Float, nullable=False),
    Column("log_return", Float, nullable=False),
    Column("batch_id", Integer, ForeignKey("ingest_batches.id"), nullable=False),
    UniqueConstraint("symbol", "date", "close", name="uq_suspect_tick"),
)

__all__ = [
    "close_revisions",
    "closes",
    "ingest_batches",
    "instruments",
    "metadata",
    "schema_version",
    "suspect_ticks",
]
