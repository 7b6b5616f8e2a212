"""The daily run: once per day, never silently skipped, one winner when two race, a killed
run finished by the next start, catch-up of missed days, and the scheduler process."""

from __future__ import annotations

import datetime as dt
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pandas as pd
import pytest
from bs4 import BeautifulSoup

from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.pipeline import daily, ingest_file, init_store, run_daily, run_days
from storage import Store
from storage import alerts as alerts_store
from storage import outbox as outbox_store
from storage import runs as runs_store
from tests.conftest import RecordingRelay
from tests.scenarios import INSTRUMENTS, RULES, break_scenario, digest_section

SCHEDULE = """
[schedule]
days = ["mon", "tue", "wed", "thu", "fri"]
time = "18:30"
holidays = ["2023-12-25", "2023-12-26"]
"""
HISTORY_END = dt.date(2023, 12, 15)
LATER_DAYS = [dt.date(2023, 12, d) for d in (18, 19, 20, 21, 22, 27, 28, 29)]


@pytest.fixture(scope="module")
def closes() -> pd.DataFrame:
    frame = generate(break_scenario()).closes
    frame.index.name = "date"
    return frame




@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings], closes: pd.DataFrame,
         relay: RecordingRelay) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SCHEDULE + digest_section(relay.port))
    store = init_store(settings)
    history = tmp_path / "history.csv"
    closes.loc[: pd.Timestamp(HISTORY_END)].to_csv(history, date_format="%Y-%m-%d")
    ingest_file(store, settings, history, today=HISTORY_END)
    yield store, settings
    store.dispose()


def _drop(settings: Settings, closes: pd.DataFrame, day: dt.date) -> Path:
    """The day's closes as a long CSV in the inbox, as a price feed would leave them."""
    row = closes.loc[pd.Timestamp(day)]
    path = settings.inbox / f"closes-{day}.csv"
    settings.inbox.mkdir(parents=True, exist_ok=True)
    lines = ["date,symbol,close"] + [f"{day},{s},{v}" for s, v in row.items() if pd.notna(v)]
    path.write_text("\n".join(lines) + "\n")
    return path


def _daily_rows(store: Store, status: str | None = "done") -> list[runs_store.RunRow]:
    with store.connect() as conn:
        return runs_store.list_runs(conn, kind="daily", status=status)


def _alert_keys(store: Store) -> list[tuple[str, str, dt.date]]:
    with store.connect() as conn:
        return sorted((a.rule, a.target, a.opened_on) for a in alerts_store.list_alerts(conn))


def test_running_the_same_day_twice_sends_one_digest_and_no_duplicates(
    desk: tuple[Store, Settings], closes: pd.DataFrame, relay: RecordingRelay
) -> None:
    store, settings = desk
    day = LATER_DAYS[0]
    _drop(settings, closes, day)
    first = run_daily(store, settings, day, environ={})
    assert first.status == "done" and first.digest is not None
    assert first.digest.status == "sent"
    alerts = _alert_keys(store)
    second = run_daily(store, settings, day, environ={})
    assert second.status == "already done" and "already done" in second.message
    forced = run_daily(store, settings, day, force=True, environ={})
    assert forced.status == "done"
    assert len(relay.messages) == 2  # the forced rerun resends on purpose, nothing more
    assert _alert_keys(store) == alerts
    assert (settings.inbox / "processed" / f"closes-{day}.csv").is_file()
    assert len(_daily_rows(store)) == 2


def test_empty_inbox_on_a_business_day_opens_a_data_alert_and_says_so(
    desk: tuple[Store, Settings], relay: RecordingRelay
) -> None:
    store, settings = desk
    day = LATER_DAYS[0]
    report = run_daily(store, settings, day, environ={})
    assert report.feed_problem.startswith(f"no new closes for {day}")
    with store.connect() as conn:
        feed = alerts_store.list_alerts(conn, open_only=True, rule="data-feed")
    assert len(feed) == 1 and feed[0].severity == "critical"
    assert report.digest is not None
    html = (report.digest.folder / "digest.html").read_text(encoding="utf-8")
    assert f"No closes for {day}" in html
    assert "data-feed" in html  # the alert itself is listed, not only the headline
    # The run's summary counts the data-feed alert it opened; the digest is headed with
    # the run's date, not the last close's.
    assert report.feed_event == "opened"
    assert report.evaluation is not None
    e = report.evaluation
    assert f"; {e.opened + 1} opened, {e.cleared} cleared" in daily._describe_daily(report)
    text = (report.digest.folder / "digest.txt").read_text(encoding="utf-8")
    assert text.splitlines()[0].endswith(f"correlation digest for {day}")
    assert f"correlation digest for {day}" in html
    assert report.digest.subject.split(": correlation digest ")[1].startswith(str(day))
    later = run_daily(store, settings, LATER_DAYS[1], environ={})
    assert later.feed_event == "continuing" and later.evaluation is not None
    assert (f"; {later.evaluation.opened} opened, {later.evaluation.cleared} cleared"
            in daily._describe_daily(later))


def test_a_day_without_closes_shows_the_data_feed_block_not_an_alert_card(
    desk: tuple[Store, Settings], relay: RecordingRelay
) -> None:
    """The data-feed alert is shown as what it is: which instruments have no close, since
    when, which file was refused and why; never as a correlation card ("[CRITICAL] all",
    "Held: 0 days")."""
    store, settings = desk
    day = LATER_DAYS[0]
    settings.inbox.mkdir(parents=True, exist_ok=True)
    (settings.inbox / "late.csv").write_text(
        f"date,symbol,close\n{day},KLV,minus one\n{day},DUNQ,12.5\n")
    report = run_daily(store, settings, day, environ={}, send=False)
    assert report.digest is not None and report.collected is not None
    assert len(report.collected.rejected) == 1
    text = (report.digest.folder / "digest.txt").read_text(encoding="utf-8")
    html = (report.digest.folder / "digest.html").read_text(encoding="utf-8")
    assert "[CRITICAL] all" not in text and "Held:       0 days" not in text
    feed = text.split("DATA FEED", 1)[1].split("NEW ALERTS", 1)[0]
    assert f"[CRITICAL] no closes for {day} by run time" in feed
    assert "latest closes are from 2023-12-15" in feed
    for symbol in ("KLV", "DUNQ", "TEZ10"):
        assert re.search(rf"^  {symbol} +latest close 2023-12-15, 1 business day without", feed,
                         flags=re.M)
    assert "late.csv:2: close 'minus one' for KLV" in feed
    new_part = text.split("NEW ALERTS", 1)[1].split("STILL OPEN", 1)[0]
    assert "data-feed" not in new_part
    soup = BeautifulSoup(html, "html.parser")
    rows = soup.select("#data-feed tr.data-alert")
    assert [r["data-state"] for r in rows] == ["new"]
    assert {r["data-symbol"] for r in soup.select("#data-feed tr.missing")} == {
        "KLV", "DUNQ", "TEZ10"}
    assert soup.select("#new-alerts table.alert") == []


def test_a_rejected_file_is_moved_aside_with_its_report(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    day = LATER_DAYS[0]
    _drop(settings, closes, day)
    bad = settings.inbox / "broken.csv"
    bad.write_text("date,symbol,close\n2023-12-18,KLV,minus one\n")
    report = run_daily(store, settings, day, environ={}, send=False)
    assert report.status == "done"
    assert report.collected is not None and len(report.collected.rejected) == 1
    problems = settings.inbox / "rejected" / "broken.csv.problems.txt"
    assert "broken.csv:2: close 'minus one' for KLV on 2023-12-18 is not a number" in (
        problems.read_text())
    assert not bad.exists()


def test_catch_up_runs_each_missed_day_in_order_with_its_own_digest(
    desk: tuple[Store, Settings], closes: pd.DataFrame, relay: RecordingRelay
) -> None:
    store, settings = desk
    for day in LATER_DAYS[:5]:
        _drop(settings, closes, day)
    run_daily(store, settings, LATER_DAYS[0], environ={})
    # Missed 19, 20 and 21 December; the run for the 22nd catches up first.
    reports = run_days(store, settings, LATER_DAYS[4])
    assert [r.as_of for r in reports] == LATER_DAYS[1:5]
    assert [r.as_of for r in _daily_rows(store)] == LATER_DAYS[:5]
    with store.connect() as conn:
        sent = [outbox_store.sent_for(conn, day) for day in LATER_DAYS[:5]]
    assert all(row is not None for row in sent)
    assert len(relay.messages) == 5  # one digest per day (documented choice)


def test_catch_up_skips_weekends_and_holidays(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    for day in LATER_DAYS[4:6]:
        _drop(settings, closes, day)
    run_daily(store, settings, LATER_DAYS[4], send=False)
    reports = run_days(store, settings, dt.date(2023, 12, 27))
    assert [r.as_of for r in reports] == [dt.date(2023, 12, 27)]


def _cli(config: Path, *args: str, env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "monitor", *args, "--config", str(config)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, **(env or {})})


@pytest.mark.slow
def test_two_processes_racing_for_the_same_day_do_the_work_once(
    desk: tuple[Store, Settings], closes: pd.DataFrame, relay: RecordingRelay
) -> None:
    store, settings = desk
    day = LATER_DAYS[0]
    _drop(settings, closes, day)
    assert settings.path is not None
    racers = [_cli(settings.path, "run", "--once", "--as-of", str(day)) for _ in range(2)]
    outputs = [p.communicate(timeout=300) for p in racers]
    codes = sorted(p.returncode for p in racers)
    assert len(_daily_rows(store)) == 1
    assert len(relay.messages) == 1
    joined = " ".join(out + err for out, err in outputs)
    assert codes == [0, 0] and "already done" in joined or (
        codes == [0, 1] and "another comove process" in joined)


@pytest.mark.slow
def test_a_killed_run_is_finished_by_the_next_start_with_the_same_result(
    desk: tuple[Store, Settings], closes: pd.DataFrame, tmp_path: Path,
    write_settings: Callable[..., Settings], relay: RecordingRelay
) -> None:
    store, settings = desk
    day = LATER_DAYS[0]
    _drop(settings, closes, day)
    assert settings.path is not None
    proc = _cli(settings.path, "run", "--once", "--as-of", str(day),
                env={"COMOVE_COMMIT_DAYS": "5"})
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        with store.connect() as conn:
            if alerts_store.events_for(conn):
                break
        time.sleep(0.01)
    assert proc.poll() is None, "the run ended before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=30)
    assert _daily_rows(store) == []
    rerun = _cli(settings.path, "run", "--once", "--as-of", str(day))
    out, err = rerun.communicate(timeout=300)
    assert rerun.returncode == 0, err
    statuses = [r.status for r in _daily_rows(store, status=None)]
    assert statuses == ["interrupted", "done"]
    killed = _alert_keys(store)

    clean = write_settings(f"sqlite:///{tmp_path / 'clean.sqlite'}",
                           INSTRUMENTS + RULES + SCHEDULE + digest_section(relay.port))
    clean_store = init_store(clean)
    history = tmp_path / "history.csv"
    closes.loc[: pd.Timestamp(day)].to_csv(history, date_format="%Y-%m-%d")
    ingest_file(clean_store, clean, history, today=day)
    run_daily(clean_store, clean, day, environ={}, send=False)
    assert _alert_keys(clean_store) == killed
    clean_store.dispose()


@pytest.mark.slow
def test_run_starts_logs_its_next_fire_time_and_stops_on_sigterm(
    desk: tuple[Store, Settings]
) -> None:
    store, settings = desk
    assert settings.path is not None
    proc = _cli(settings.path, "run", "--no-catch-up")
    lines: list[str] = []
    deadline = time.monotonic() + 60
    assert proc.stderr is not None
    while time.monotonic() < deadline:
        line = proc.stderr.readline()
        if not line:
            break
        lines.append(line)
        if "next run at" in line:
            break
    assert any("next run at" in line for line in lines), lines
    proc.send_signal(signal.SIGTERM)
    proc.communicate(timeout=30)
    assert proc.returncode == 0
    assert (Path(settings.store_url.removeprefix("sqlite:///")).parent
            / "comove.log").is_file()


def _feed_alerts(store: Store) -> list[alerts_store.AlertRow]:
    with store.connect() as conn:
        return alerts_store.list_alerts(conn, open_only=False, rule="data-feed")


@pytest.mark.parametrize("shut", ["instrument calendars", "schedule calendar", "holiday"])
def test_no_data_feed_alert_on_a_day_the_markets_are_shut(
    tmp_path: Path, write_settings: Callable[..., Settings], shut: str
) -> None:
    calendars = {"instrument calendars": ("XNYS", "XLON"), "schedule calendar": ("", ""),
                 "holiday": ("", "")}[shut]
    schedule = {"instrument calendars": "", "schedule calendar": 'calendar = "XNYS"',
                "holiday": 'holidays = ["2027-01-01"]'}[shut]
    body = (f'[[instruments]]\nsymbol = "KLV"\ncalendar = "{calendars[0]}"\n'
            f'[[instruments]]\nsymbol = "ORMA"\ncalendar = "{calendars[1]}"\n'
            f'[schedule]\n{schedule}\n')
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", body)
    store = init_store(settings)
    history = tmp_path / "closes.csv"
    history.write_text("date,symbol,close\n2026-12-30,KLV,100\n2026-12-30,ORMA,50\n"
                       "2026-12-31,KLV,101\n2026-12-31,ORMA,51\n")
    ingest_file(store, settings, history, today=dt.date(2026, 12, 31))
    new_year = run_daily(store, settings, dt.date(2027, 1, 1), send=False)
    assert new_year.status == "done" and new_year.feed_problem == ""
    assert _feed_alerts(store) == []
    # The next trading day without closes does raise it.
    monday = run_daily(store, settings, dt.date(2027, 1, 4), send=False)
    assert monday.feed_problem.startswith("no new closes for 2027-01-04")
    assert [a.opened_on for a in _feed_alerts(store)] == [dt.date(2027, 1, 4)]
    store.dispose()


def test_inbox_skip_bad_writes_the_good_rows_and_names_every_skipped_line(
    tmp_path: Path, write_settings: Callable[..., Settings], closes: pd.DataFrame,
    relay: RecordingRelay,
) -> None:
    """`[sources] skip_bad = true`: a file with one bad line is not refused whole; its good
    rows are stored, the bad line is named (file:line) in processed/<file>.problems.txt and
    in the digest's Data feed block, and the run counts as a data problem (exit code 3)."""
    from monitor.scheduler import EXIT_DATA, once_exit_code

    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SCHEDULE + digest_section(relay.port)
                              + "\n[sources]\nskip_bad = true\n")
    store = init_store(settings)
    history = tmp_path / "history.csv"
    closes.loc[: pd.Timestamp(HISTORY_END)].to_csv(history, date_format="%Y-%m-%d")
    ingest_file(store, settings, history, today=HISTORY_END)
    day = LATER_DAYS[0]
    path = _drop(settings, closes, day)
    path.write_text(path.read_text() + f"{day},KLV2,minus one\n")
    bad_line = len(path.read_text().splitlines())
    try:
        report = run_daily(store, settings, day, environ={}, send=False)
        assert report.collected is not None
        assert report.collected.rejected == []
        assert [(p.name, n) for p, n in report.collected.skipped] == [(path.name, 1)]
        assert once_exit_code([report]) == EXIT_DATA
        from monitor.pipeline.store import read_closes
        stored = read_closes(store)
        row = closes.loc[pd.Timestamp(day)]
        assert stored.loc[pd.Timestamp(day)].dropna().to_dict() == row.dropna().to_dict()
        problems = (settings.inbox / "processed" / f"{path.name}.problems.txt").read_text()
        assert problems.startswith(f"{path.name}: 1 line(s) skipped, the other ")
        assert f"{path.name}:{bad_line}:" in problems
        assert report.digest is not None
        text = (report.digest.folder / "digest.txt").read_text(encoding="utf-8")
        feed = text.split("DATA FEED", 1)[1].split("NEW ALERTS", 1)[0]
        assert "Lines skipped in the last 24 hours (the rest of each file was written):" in feed
        assert "Files refused" not in feed
        assert f"{path.name}:{bad_line}:" in feed
        html = BeautifulSoup((report.digest.folder / "digest.html").read_text(
            encoding="utf-8"), "html.parser")
        assert [d["data-file"] for d in html.select("#data-feed div.skipped")] == [path.name]
        assert html.select("#data-feed div.refused") == []
    finally:
        store.dispose()
