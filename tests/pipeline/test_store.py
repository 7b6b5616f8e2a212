"""The store: created idempotently, pragmas set on SQLite, schema version checked at open."""

from __future__ import annotations

from pathlib import Path

import pytest
import sqlalchemy as sa

import storage.db
from storage import SCHEMA_VERSION, StoreError, open_store


def test_create_is_idempotent_and_records_the_schema_version(store_url: str) -> None:
    store = open_store(store_url, create=True)
    open_store(store_url, create=True).dispose()
    with store.connect() as conn:
        versions = conn.execute(sa.text("select version from schema_version")).scalars().all()
    store.dispose()
    assert versions == [SCHEMA_VERSION]


def test_opening_an_uninitialised_store_says_run_init(store_url: str) -> None:
    with pytest.raises(StoreError, match="not initialised: run `comove init` first"):
        open_store(store_url)


def test_schema_version_mismatch_is_refused_with_a_clear_message(
    store_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    open_store(store_url, create=True).dispose()
    monkeypatch.setattr(storage.db, "SCHEMA_VERSION", SCHEMA_VERSION + 1)
    with pytest.raises(StoreError) as info:
        open_store(store_url)
    assert f"schema version {SCHEMA_VERSION}, this comove needs {SCHEMA_VERSION + 1}" in str(
        info.value
    )


def test_sqlite_uses_wal_busy_timeout_and_foreign_keys(tmp_path: Path) -> None:
    store = open_store(f"sqlite:///{tmp_path / 's.sqlite'}", create=True)
    with store.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
        assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == 30000
    with pytest.raises(sa.exc.IntegrityError), store.begin() as conn:
        conn.exec_driver_sql(
            "INSERT INTO closes(symbol, date, close, source) VALUES ('NOPE', '2024-01-02', 1, '')"
        )
    store.dispose()


def test_unreachable_database_is_a_one_line_error() -> None:
    with pytest.raises(StoreError) as info:
        open_store("postgresql+psycopg://nobody@127.0.0.1:1/none", create=True)
    assert str(info.value).startswith("cannot open store postgresql+psycopg://nobody@127.0.0.1:1")
    assert "\n" not in str(info.value)


def test_a_url_that_is_not_a_url_is_refused() -> None:
    with pytest.raises(StoreError, match="is not a SQLAlchemy URL"):
        open_store("not a url at all")


def test_words_older_versions_stored_are_read_as_the_new_words(store_url: str) -> None:
    """An alert a rerun retracted was stored as 'withdrawn' and a group-average rule's kind
    as 'basket' before the rename; both read as today's words, and the day's listing
    leaves the retracted alert out whichever word it was stored under."""
    import datetime as dt

    from storage import alerts as alerts_store
    from storage.schema import alerts

    day = dt.date(2026, 3, 2)
    store = open_store(store_url, create=True)
    try:
        with store.begin() as conn:
            for rule, state, kind in (("old", "withdrawn", "basket"), ("new", "retracted", "level"),
                                      ("live", "open", "group-average")):
                conn.execute(alerts.insert().values(
                    rule=rule, target="core", opened_on=day, first_breach_on=day,
                    rule_kind=kind, severity="info", measure="rolling:63", state=state))
        with store.connect() as conn:
            rows = {r.rule: r for r in alerts_store.list_alerts(conn)}
            shown = [r.rule for r in alerts_store.list_alerts(conn, open_on=day)]
    finally:
        store.dispose()
    assert (rows["old"].state, rows["old"].rule_kind) == ("retracted", "group-average")
    assert (rows["new"].state, rows["live"].rule_kind) == ("retracted", "group-average")
    assert shown == ["live"]
