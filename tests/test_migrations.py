"""Schema migrations: a store at schema version 1 (as comove made it before migrations) is
refused with advice, then upgraded in place by `comove init`, keeping its closes, alerts,
acknowledgements and mutes; on SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa

from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.pipeline import acknowledge, backfill, ingest_file, init_store, mute
from storage import StoreError, migrate, open_store
from storage import alerts as alerts_store
from storage.db import SCHEMA_VERSION
from tests.scenarios import INSTRUMENTS, RULES, break_scenario

NEW_IN_2 = ("retracted_on", "retracted_reason", "retracted_batch")


def _as_version_1(url: str) -> None:
    """Turn a store made by this comove into one as schema version 1 left it: without the
    columns version 2 added, without Alembic's table, with version 1 recorded and the
    state word version 1 wrote."""
    engine = sa.create_engine(url.replace("postgresql://", "postgresql+psycopg://", 1))
    with engine.begin() as conn:
        for column in NEW_IN_2:
            conn.execute(sa.text(f"ALTER TABLE alerts DROP COLUMN {column}"))
        conn.execute(sa.text("DROP TABLE alembic_version"))
        conn.execute(sa.text("DELETE FROM schema_version WHERE version > 1"))
        conn.execute(sa.text("INSERT INTO schema_version (version, applied_at) "
                             "SELECT 1, CURRENT_TIMESTAMP WHERE NOT EXISTS "
                             "(SELECT 1 FROM schema_version WHERE version = 1)"))
        conn.execute(sa.text("UPDATE alerts SET state = 'withdrawn' WHERE id = "
                             "(SELECT MAX(id) FROM alerts)"))
    engine.dispose()


def _snapshot(url: str) -> dict[str, list[tuple[object, ...]]]:
    store = open_store(url)
    tables = {"closes": "SELECT symbol, date, close FROM closes ORDER BY symbol, date",
              "alerts": "SELECT id, rule, target, opened_on, cleared_on FROM alerts ORDER BY id",
              "acks": "SELECT alert_id, \"by\", note FROM acknowledgements ORDER BY alert_id",
              "mutes": "SELECT rule, target, until, reason FROM mutes ORDER BY id"}
    with store.connect() as conn:
        out = {name: [tuple(row) for row in conn.execute(sa.text(query))]
               for name, query in tables.items()}
    store.dispose()
    return out


def test_a_version_1_store_is_upgraded_in_place_keeping_alerts_and_acknowledgements(
    store_url: str, write_settings: Callable[..., Settings], tmp_path: Path
) -> None:
    settings = write_settings(store_url, INSTRUMENTS + RULES)
    store = init_store(settings)
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    path = tmp_path / "history.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    ingest_file(store, settings, path)
    backfill(store, settings, None, None)
    with store.connect() as conn:
        alerts = alerts_store.list_alerts(conn)
    assert len(alerts) >= 2
    acknowledge(store, settings, alerts[0].id, by="R. Vell", note="hedge being rebuilt")
    mute(store, settings, rule="hedge-jump", pair=None, until=dt.date(2099, 1, 1),
         reason="noisy while rebuilt")
    store.dispose()
    before = _snapshot(store_url)
    _as_version_1(store_url)

    with pytest.raises(StoreError, match=r"schema version 1, this comove needs 2: back it up, "
                                         r"then run `comove init` to upgrade it"):
        open_store(store_url)
    upgraded = init_store(settings)  # what `comove init` does
    upgraded.dispose()
    after = _snapshot(store_url)
    assert after == before
    store = open_store(store_url)
    with store.connect() as conn:
        assert migrate.current_revision(conn) == migrate.head_revision()
        versions = conn.execute(sa.text("SELECT MAX(version) FROM schema_version")).scalar()
        assert versions == SCHEMA_VERSION == 2
        states = {a.id: a.state for a in alerts_store.list_alerts(conn)}
        columns = {c["name"] for c in sa.inspect(conn).get_columns("alerts")}
    assert set(NEW_IN_2) <= columns
    assert states[max(states)] == "retracted"  # version 1's word rewritten
    assert "withdrawn" not in states.values()
    # The upgraded store works: a rerun of the evaluation keeps the acknowledgement.
    backfill(store, settings, None, None, force=True)
    with store.connect() as conn:
        kept = alerts_store.get_alert(conn, alerts[0].id)
    assert kept is not None and kept.acknowledged_by == "R. Vell"
    # A second `comove init` changes nothing.
    init_store(settings).dispose()
    assert _snapshot(store_url)["acks"] == before["acks"]
    store.dispose()


def test_a_store_from_a_newer_comove_is_refused(
    store_url: str, write_settings: Callable[..., Settings]
) -> None:
    settings = write_settings(store_url, INSTRUMENTS)
    init_store(settings).dispose()
    engine = sa.create_engine(store_url.replace("postgresql://", "postgresql+psycopg://", 1))
    with engine.begin() as conn:
        conn.execute(sa.text("INSERT INTO schema_version (version, applied_at) "
                             "VALUES (99, CURRENT_TIMESTAMP)"))
    engine.dispose()
    with pytest.raises(StoreError, match="written by a newer comove; upgrade comove"):
        open_store(store_url)


def test_every_schema_version_has_its_revision_and_the_newest_is_the_head() -> None:
    assert sorted(migrate.REVISION_OF_VERSION) == list(range(1, SCHEMA_VERSION + 1))
    assert migrate.REVISION_OF_VERSION[SCHEMA_VERSION] == migrate.head_revision()
    scripts = sorted(p.name for p in (migrate.MIGRATIONS / "versions").glob("*.py"))
    assert [name[:4] for name in scripts] == list(migrate.REVISION_OF_VERSION.values())
    assert pd.Series(scripts).is_unique
