"""`[pages] base_url`: every alert in the email links to its page on the history site, and
every such link, taken from the real MIME message the relay received, names a page the
pages build wrote and an alert row on it; the page shows the acknowledge command."""

from __future__ import annotations

import datetime as dt
import email
from collections.abc import Callable, Iterator
from email.message import EmailMessage
from email.policy import default as default_policy
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from bs4 import BeautifulSoup

from monitor.config import Settings, load_settings
from monitor.demo.synthetic import generate
from monitor.errors import ConfigError
from monitor.pipeline import build_pages, evaluate_range, ingest_file, init_store, send_digest
from storage import Store
from storage import alerts as alerts_store
from tests.conftest import RecordingRelay
from tests.scenarios import BREAK_END, INSTRUMENTS, RULES, break_scenario

BASE = "https://risk.halden.example/comove/"


@pytest.fixture(scope="module")
def closes_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    path = tmp_path_factory.mktemp("closes") / "closes.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    return path


def _sections(port: int, base_url: str | None) -> str:
    text = (f'\n[digest]\nrecipients = ["risk@halden.example"]\nsender = "comove@halden.example"'
            f'\nsmtp_host = "127.0.0.1"\nsmtp_port = {port}\nsecurity = "none"\nattempts = 1\n')
    if base_url is not None:
        text += f'\n[pages]\nbase_url = "{base_url}"\n'
    return text


def _desk(store_url: str, write_settings: Callable[..., Settings], closes_csv: Path,
          relay: RecordingRelay, base_url: str | None) -> tuple[Store, Settings]:
    settings = write_settings(store_url, INSTRUMENTS + RULES + _sections(relay.port, base_url))
    store = init_store(settings)
    ingest_file(store, settings, closes_csv, today=dt.date(2024, 1, 5))
    # Evaluated to the break's last day, so its alert is still open on the pages.
    evaluate_range(store, settings, None, BREAK_END)
    return store, settings


@pytest.fixture
def linked(store_url: str, write_settings: Callable[..., Settings], closes_csv: Path,
           relay: RecordingRelay) -> Iterator[tuple[Store, Settings]]:
    store, settings = _desk(store_url, write_settings, closes_csv, relay, BASE.rstrip("/"))
    yield store, settings
    store.dispose()


def _opening_day(store: Store) -> dt.date:
    with store.connect() as conn:
        return next(a for a in alerts_store.list_alerts(conn) if a.rule == "hedge-break").opened_on


def _parts(raw: bytes) -> tuple[BeautifulSoup, str]:
    message = email.message_from_bytes(raw, policy=default_policy)
    assert isinstance(message, EmailMessage)
    html = message.get_body(("html",))
    text = message.get_body(("plain",))
    assert html is not None and text is not None
    return BeautifulSoup(html.get_content(), "html.parser"), text.get_content()


def test_every_alert_in_the_sent_email_links_to_its_row_on_the_built_pages(
    linked: tuple[Store, Settings], relay: RecordingRelay, tmp_path: Path
) -> None:
    store, settings = linked
    day = _opening_day(store)
    assert settings.pages.site_url == BASE  # the missing "/" is added
    site = tmp_path / "site"
    build_pages(store, settings, site)
    assert send_digest(store, settings, day, environ={}).status == "sent"
    soup, text = _parts(relay.messages[-1])
    cards = soup.select("#new-alerts table.alert")
    assert cards, "the break opens an alert that day"
    links = []
    for card in cards:
        hrefs = {a["href"] for a in card.select("a[href]")}
        assert len(hrefs) == 1, hrefs  # the pair's name and the page line: one address
        links.append(hrefs.pop())
    for row in soup.select("tr.alert-row"):
        links.append(row.select_one("a.pair-link")["href"])
    for link in links:
        parts = urlsplit(link)
        assert link.startswith(BASE) and parts.fragment.startswith("alert-")
        page = site / parts.path.removeprefix(urlsplit(BASE).path)
        assert page.is_file(), link
        target = BeautifulSoup(page.read_text(encoding="utf-8"), "html.parser")
        row = target.find(id=parts.fragment)
        assert row is not None, link
        alert_id = row["data-alert"]
        # The same alert's row: its id is the anchor's number.
        assert parts.fragment == f"alert-{alert_id}"
        assert link in text  # the plain-text part carries the same address
    # Each page shows the exact acknowledge command of its open, unacknowledged alerts
    # and of no other.
    with store.connect() as conn:
        stored = alerts_store.list_alerts(conn)
    waiting = {str(a.id) for a in stored if a.state == "open" and not a.acknowledged_by}
    assert waiting, "the scenario leaves an alert open"
    shown = {}
    for page in site.rglob("*.html"):
        for code in BeautifulSoup(page.read_text(encoding="utf-8"), "html.parser").select(
                "code.ack-command"):
            words = code.get_text().split()
            shown[words[2]] = code.get_text()
    assert set(shown) == waiting
    for alert_id, command in shown.items():
        assert command == f'comove ack {alert_id} --by "$USER"'


def test_without_base_url_the_email_carries_no_links(
    store_url: str, write_settings: Callable[..., Settings], closes_csv: Path,
    relay: RecordingRelay,
) -> None:
    store, settings = _desk(store_url, write_settings, closes_csv, relay, None)
    try:
        assert send_digest(store, settings, _opening_day(store), environ={}).status == "sent"
    finally:
        store.dispose()
    soup, text = _parts(relay.messages[-1])
    assert soup.select("#new-alerts table.alert")
    assert not soup.select("a.pair-link") and not soup.select(".page-link")
    assert "Page:" not in text


@pytest.mark.parametrize("value", ["risk.halden.example/comove", "ftp://risk.halden.example/",
                                   "https://", "https://risk.halden.example/?q=1",
                                   "https://risk.halden.example/a b/"])
def test_a_base_url_that_is_not_a_web_address_is_refused_naming_the_key(
    tmp_path: Path, value: str
) -> None:
    path = tmp_path / "comove.toml"
    path.write_text(f'[pages]\nbase_url = "{value}"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=r"pages\.base_url.*http:// or https://"):
        load_settings(path)
