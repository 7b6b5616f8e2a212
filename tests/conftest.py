"""Shared fixtures: a store on each backend, settings files written to tmp_path."""

from __future__ import annotations

import logging
import os
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from monitor.config import Settings, load_settings

PG_SERVER = os.environ.get("COMOVE_TEST_PG", "postgresql+psycopg://postgres@127.0.0.1:5432/test")
UNDER_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


@pytest.fixture(autouse=True)
def _comove_logger_as_it_was() -> Iterator[None]:
    """Put the "comove" logger back after each test: a test that runs the command line
    installs its console handler, which must not write into the next test's output."""
    logger = logging.getLogger("comove")
    handlers, level, propagate = list(logger.handlers), logger.level, logger.propagate
    yield
    for handler in list(logger.handlers):
        if handler not in handlers:
            logger.removeHandler(handler)
    for handler in handlers:
        if handler not in logger.handlers:
            logger.addHandler(handler)
    logger.setLevel(level)
    logger.propagate = propagate


def _pg_reachable() -> str | None:
    """None when the PostgreSQL test server answers, else the reason it does not."""
    import sqlalchemy as sa

    engine = sa.create_engine(PG_SERVER)
    try:
        with engine.connect() as conn:
            conn.execute(sa.text("select 1"))
    except Exception as exc:  # any failure to connect is the reason to report
        return str(exc).splitlines()[0]
    finally:
        engine.dispose()
    return None


@pytest.fixture(scope="session")
def pg_available() -> None:
    reason = _pg_reachable()
    if reason is None:
        return
    if UNDER_CI:
        pytest.fail(f"PostgreSQL test server {PG_SERVER} is not reachable under CI: {reason}")
    pytest.skip(f"PostgreSQL test server {PG_SERVER} not reachable: {reason}")


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A URL of an empty store: a SQLite file, or a fresh PostgreSQL schema for this test."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'store.sqlite'}"
        return
    request.getfixturevalue("pg_available")
    import sqlalchemy as sa

    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(PG_SERVER, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
    sep = "&" if "?" in PG_SERVER else "?"
    try:
        yield f"{PG_SERVER}{sep}options=-csearch_path%3D{schema}"
    finally:
        with admin.connect() as conn:
            conn.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


DESK_TOML = """
[desk]
name = "Halden Test Desk"
timezone = "Europe/Berlin"

[[instruments]]
symbol = "KLV"
name = "Kelvara Industrial"
group = "equities"

[[instruments]]
symbol = "ORMA"
name = "Orma Utilities"
group = "equities"

[[instruments]]
symbol = "TEZ10"
name = "Tezran 10-year bond future"
group = "rates"
"""


def _toml_string(value: str) -> str:
    return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'


@pytest.fixture
def write_settings(tmp_path: Path) -> Callable[..., Settings]:
    """Write a comove.toml into tmp_path and load it: write_settings(url, extra="...")."""

    def write(url: str, body: str = DESK_TOML, extra: str = "") -> Settings:
        path = tmp_path / "comove.toml"
        path.write_text(f"[store]\nurl = {_toml_string(url)}\n{body}\n{extra}\n",
                        encoding="utf-8")
        return load_settings(path)

    return write


@pytest.fixture
def settings(store_url: str, write_settings: Callable[..., Settings]) -> Settings:
    return write_settings(store_url)


class RecordingRelay:
    """A plain SMTP server in the test process (aiosmtpd) that keeps what it receives."""

    def __init__(self) -> None:
        import socket

        with socket.socket() as probe:
            probe.bind(("127.0.0.1", 0))
            self.port = int(probe.getsockname()[1])
        self.messages: list[bytes] = []
        self.controller = None

    async def handle_DATA(self, server: object, session: object, envelope: object) -> str:
        self.messages.append(envelope.original_content or envelope.content)  # type: ignore[attr-defined]
        return "250 2.0.0 Accepted"

    def start(self) -> None:
        from aiosmtpd.controller import Controller

        self.controller = Controller(self, hostname="127.0.0.1", port=self.port)
        self.controller.start()  # type: ignore[attr-defined]

    def stop(self) -> None:
        if self.controller is not None:
            self.controller.stop()  # type: ignore[attr-defined]
            self.controller = None


@pytest.fixture
def relay() -> Iterator[RecordingRelay]:
    server = RecordingRelay()
    server.start()
    yield server
    server.stop()
