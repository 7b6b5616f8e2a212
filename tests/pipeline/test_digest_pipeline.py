"""The digest from the store: the planted break shows up with its drivers; the outbox keeps
every digest until it is sent, sends each date once, and retries after a failure."""

from __future__ import annotations

import datetime as dt
import email
from collections.abc import Callable, Iterator
from email.policy import default as default_policy
from pathlib import Path

import pytest
from bs4 import BeautifulSoup

from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.digest import MailError
from monitor.pipeline import (
    evaluate_range,
    ingest_file,
    init_store,
    render_digest_files,
    send_digest,
)
from storage import Store
from storage import alerts as alerts_store
from storage import outbox as outbox_store
from tests.conftest import RecordingRelay
from tests.scenarios import INSTRUMENTS, RULES, break_scenario


@pytest.fixture(scope="module")
def closes_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    path = tmp_path_factory.mktemp("closes") / "closes.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    return path


def _digest_section(port: int) -> str:
    return (f'\n[digest]\nrecipients = ["risk@halden.example"]\nsender = "comove@halden.example"'
            f'\nsmtp_host = "127.0.0.1"\nsmtp_port = {port}\nsecurity = "none"\nattempts = 2'
            '\nbackoff_seconds = 0.01\n')


@pytest.fixture
def desk(store_url: str, write_settings: Callable[..., Settings], closes_csv: Path,
         relay: RecordingRelay) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(store_url, INSTRUMENTS + RULES + _digest_section(relay.port))
    store = init_store(settings)
    ingest_file(store, settings, closes_csv, today=dt.date(2024, 1, 5))
    evaluate_range(store, settings, None, None)
    yield store, settings
    store.dispose()


def _break_alert(store: Store) -> alerts_store.AlertRow:
    with store.connect() as conn:
        return next(a for a in alerts_store.list_alerts(conn) if a.rule == "hedge-break")


def test_digest_for_the_opening_day_shows_the_break_with_its_drivers(
    desk: tuple[Store, Settings], tmp_path: Path
) -> None:
    store, settings = desk
    alert = _break_alert(store)
    outcome = render_digest_files(store, settings, alert.opened_on, out_dir=tmp_path / "d",
                                  now=dt.datetime(2024, 1, 5, 18, tzinfo=dt.UTC))
    soup = BeautifulSoup(outcome.paths.html.read_text(encoding="utf-8"), "html.parser")
    text = soup.get_text(" ", strip=True)
    assert "KLV Kelvara Industrial / DUNQ Dunquist Machines" in text
    assert "hedge-break" in text
    assert "critical" in text.lower()
    assert "1 new" in outcome.subject
    driver_tables = [t for t in soup.find_all("table")
                     if t.find("th", string="Contribution") and not t.find("table")]
    assert len(driver_tables) == 1, "one alert, one drivers table"
    rows = [r for r in driver_tables[0].find("tbody").find_all("tr")
            if "other-days" not in (r.get("class") or [])]
    assert len(rows) == 5
    for row in rows:
        cells = [td.get_text(strip=True) for td in row.find_all("td")]
        assert cells[1].endswith("%") and cells[2].endswith("%")  # both returns shown
    for img in soup.find_all("img"):
        assert (outcome.folder / img["src"]).is_file()
    plain = outcome.paths.text.read_text(encoding="utf-8")
    assert "KLV / DUNQ" in plain and "is investment advice" in plain
    message = email.message_from_bytes(outcome.paths.eml.read_bytes(), policy=default_policy)
    assert message.get_content_type() == "multipart/alternative"


def test_digest_is_sent_once_and_resent_only_when_asked(
    desk: tuple[Store, Settings], relay: RecordingRelay
) -> None:
    store, settings = desk
    day = _break_alert(store).opened_on
    first = send_digest(store, settings, day, environ={})
    assert first.status == "sent" and len(relay.messages) == 1
    again = send_digest(store, settings, day, environ={})
    assert again.status == "already sent" and len(relay.messages) == 1
    forced = send_digest(store, settings, day, resend=True, environ={})
    assert forced.status == "sent" and len(relay.messages) == 2
    received = email.message_from_bytes(relay.messages[0], policy=default_policy)
    assert "Halden Test Desk" in received["Subject"]


def test_failed_send_stays_in_the_outbox_and_a_rerun_delivers_it_once(
    desk: tuple[Store, Settings], relay: RecordingRelay
) -> None:
    store, settings = desk
    day = _break_alert(store).opened_on
    relay.stop()
    with pytest.raises(MailError):
        send_digest(store, settings, day, environ={}, sleep=lambda s: None)
    with store.connect() as conn:
        rows = outbox_store.for_date(conn, day)
    assert [r.status for r in rows] == ["failed"]
    assert rows[0].attempts == 2 and "127.0.0.1" in rows[0].last_error
    relay.start()
    delivered = send_digest(store, settings, day, environ={})
    assert delivered.status == "sent" and delivered.outbox_id == rows[0].id
    assert send_digest(store, settings, day, environ={}).status == "already sent"
    assert len(relay.messages) == 1
    received = email.message_from_bytes(relay.messages[0], policy=default_policy)
    assert received["Subject"] == rows[0].subject


def test_a_password_in_the_settings_file_is_refused(
    store_url: str, write_settings: Callable[..., Settings]
) -> None:
    from monitor.errors import ConfigError

    with pytest.raises(ConfigError, match="digest.password: a password in the settings file"):
        write_settings(store_url, INSTRUMENTS + '\n[digest]\npassword = "hunter2"\n')


def test_still_open_alerts_are_marked_as_reminders_only_on_their_reminder_days(
    desk: tuple[Store, Settings], tmp_path: Path
) -> None:
    store, settings = desk
    alert = _break_alert(store)
    with store.connect() as conn:
        events = alerts_store.events_for(conn, [alert.id])
    reminder_day = next(e["date"] for e in events if e["event"] == "continuing")
    quiet_day = reminder_day - dt.timedelta(days=1)
    assert quiet_day > alert.opened_on and quiet_day.weekday() < 5
    for day, expected in ((reminder_day, True), (quiet_day, False)):
        outcome = render_digest_files(store, settings, day, out_dir=tmp_path / str(day))
        soup = BeautifulSoup(outcome.paths.html.read_text(encoding="utf-8"), "html.parser")
        rows = [tr for tr in soup.find_all("tr")
                if "hedge-break" in tr.get_text() and tr.find("div", class_="reminder")
                and not tr.find("table")]
        assert len(rows) == 1
        mark = rows[0].find("div", class_="reminder").get_text(strip=True)
        assert mark == ("reminder: not acknowledged" if expected else "not acknowledged")
        line = next(x for x in outcome.paths.text.read_text().splitlines()
                    if "hedge-break" in x and "not acknowledged" in x)
        assert ("reminder: not acknowledged" in line) is expected


RANK_RULE = """
[[rules]]
name = "hedge-rank"
kind = "level"
measure = "rank:21"
pairs = ["KLV/DUNQ"]
below = 0.3
clear = 0.45
hold = 3
"""


@pytest.mark.parametrize("measure", ["rank:21", "ewma:hl=10"])
def test_drivers_of_rank_and_ewma_alerts_add_up_to_the_alerts_value(
    measure: str, tmp_path: Path, write_settings: Callable[..., Settings], closes_csv: Path
) -> None:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RANK_RULE.replace("rank:21", measure))
    store = init_store(settings)
    try:
        ingest_file(store, settings, closes_csv, today=dt.date(2024, 1, 5))
        evaluate_range(store, settings, None, None)
        with store.connect() as conn:
            alert = next(a for a in alerts_store.list_alerts(conn) if a.rule == "hedge-rank")
            opened = next(e for e in alerts_store.events_for(conn, date=alert.opened_on)
                          if e["alert_id"] == alert.id)
        outcome = render_digest_files(store, settings, alert.opened_on,
                                      out_dir=tmp_path / "d",
                                      now=dt.datetime(2024, 1, 5, 18, tzinfo=dt.UTC))
    finally:
        store.dispose()
    soup = BeautifulSoup(outcome.paths.html.read_text(encoding="utf-8"), "html.parser")
    table = soup.select_one("table.drivers")
    assert table is not None
    note = " ".join(table.find_previous("div").get_text().split())
    assert f"share of {measure} =" in note  # says which measure the days explain
    shown = [float(td.get_text().replace("\u2212", "-"))
             for td in table.select("td.contribution")]
    assert len(shown) == 6  # five days and "the other N days"
    other = " ".join(table.select_one("tr.other-days").get_text(" ").split())
    assert other.startswith("the other ") and " days " in other
    # the shown contributions (3 decimals each) add up to the alert's value
    assert sum(shown) == pytest.approx(opened["value"], abs=0.004)
    total = float(note.rsplit("=", 1)[1].replace("\u2212", "-"))
    assert total == pytest.approx(opened["value"], abs=0.0005)
