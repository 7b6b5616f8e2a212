"""Every table of the store, declared once with SQLAlchemy Core.

Prices are the source of truth; correlations are derived and cheap to recompute, so the
store keeps closes (with every restatement audited), ingest batches, alerts and their
events, acknowledgements, mutes, the runs ledger and the digest outbox.
"""

from __future__ import annotations

from sqlalchemy import (
    Boolean,
    Column,
    Date,
    DateTime,
    Float,
    ForeignKey,
    Integer,
    LargeBinary,
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
    Column("earliest_changed", Date, nullable=True),  # first new or restated date
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

alerts = Table(
    "alerts",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("rule", String(100), nullable=False),
    Column("target", String(200), nullable=False),  # "A/B", a group or a symbol
    Column("opened_on", Date, nullable=False),
    Column("first_breach_on", Date, nullable=False),
    Column("rule_kind", String(20), nullable=False),
    Column("severity", String(10), nullable=False),
    Column("measure", String(100), nullable=False, default=""),
    Column("state", String(12), nullable=False),  # open | cleared | retracted (older: withdrawn)
    Column("cleared_on", Date, nullable=True),
    Column("level", Float, nullable=True),
    Column("opened_value", Float, nullable=True),
    Column("peak_value", Float, nullable=True),
    Column("peak_on", Date, nullable=True),
    Column("last_value", Float, nullable=True),
    Column("last_on", Date, nullable=True),
    Column("announced", Boolean, nullable=False, default=True),
    # Set when the alert is retracted: the day, why (e.g. the restatement), and the
    # ingest batch that changed the closes (schema version 2).
    Column("retracted_on", Date, nullable=True),
    Column("retracted_reason", Text, nullable=True),
    Column("retracted_batch", Integer, nullable=True),
    UniqueConstraint("rule", "target", "opened_on", name="uq_alert_key"),
)

alert_events = Table(
    "alert_events",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("alert_id", Integer, ForeignKey("alerts.id"), nullable=False, index=True),
    Column("rule", String(100), nullable=False),
    Column("date", Date, nullable=False, index=True),
    Column("event", String(12), nullable=False),  # opened | continuing | cleared
    Column("value", Float, nullable=True),
    Column("level", Float, nullable=True),
    Column("low", Float, nullable=True),
    Column("high", Float, nullable=True),
    Column("n", Float, nullable=True),
    Column("z", Float, nullable=True),
    Column("p", Float, nullable=True),
    Column("reference", Float, nullable=True),
    Column("days_held", Integer, nullable=False),
    Column("announce", Boolean, nullable=False),
    UniqueConstraint("alert_id", "date", "event", name="uq_alert_event"),
)

acknowledgements = Table(
    "acknowledgements",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("alert_id", Integer, ForeignKey("alerts.id"), nullable=False, index=True),
    Column("by", String(100), nullable=False),
    Column("at", DateTime(timezone=True), nullable=False),
    Column("effective_on", Date, nullable=False),
    Column("note", Text, nullable=False, default=""),
)

mutes = Table(
    "mutes",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("rule", String(100), nullable=True),
    Column("target", String(200), nullable=True),
    Column("from_on", Date, nullable=False),
    Column("until", Date, nullable=False),
    Column("reason", Text, nullable=False),
    Column("created_at", DateTime(timezone=True), nullable=False),
)

runs = Table(
    "runs",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("kind", String(20), nullable=False),  # backfill | daily
    Column("as_of", Date, nullable=False),
    Column("range_start", Date, nullable=True),
    Column("status", String(20), nullable=False),  # running | done | failed | interrupted
    Column("started_at", DateTime(timezone=True), nullable=False),
    Column("finished_at", DateTime(timezone=True), nullable=True),
    Column("params_hash", String(64), nullable=False),
    Column("counts", Text, nullable=False, default="{}"),  # JSON
    Column("error", Text, nullable=False, default=""),
)

evaluation_state = Table(
    "evaluation_state",
    metadata,
    Column("scope", String(64), primary_key=True),  # hash of the rules and return settings
    Column("last_date", Date, nullable=False),
    Column("batch_watermark", Integer, nullable=False),
    Column("snapshot", Text, nullable=False),  # JSON of the alert book
    Column("updated_at", DateTime(timezone=True), nullable=False),
)

outbox = Table(
    "outbox",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("as_of", Date, nullable=False, index=True),
    Column("subject", String(500), nullable=False),
    Column("recipients", Text, nullable=False),
    Column("folder", String(1000), nullable=False),
    Column("message", LargeBinary, nullable=False),  # the .eml bytes, as they will be sent
    Column("status", String(12), nullable=False),  # pending | sent | failed | superseded
    Column("attempts", Integer, nullable=False, default=0),
    Column("last_error", Text, nullable=False, default=""),
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("sent_at", DateTime(timezone=True), nullable=True),
)

leases = Table(
    "leases",
    metadata,
    Column("name", String(100), primary_key=True),
    Column("owner", String(200), nullable=False),
    Column("heartbeat", DateTime(timezone=True), nullable=False),
    Column("expires", DateTime(timezone=True), nullable=False),
)

__all__ = [
    "acknowledgements",
    "alert_events",
    "alerts",
    "evaluation_state",
    "leases",
    "mutes",
    "outbox",
    "runs",
    "close_revisions",
    "closes",
    "ingest_batches",
    "instruments",
    "metadata",
    "schema_version",
    "suspect_ticks",
]
