"""The evening run under faults: a failed email never costs a later day its closes, the
inbox is read against the real today and in date order, `comove run` catches up the days
it missed when it starts, and `run --once` says what went wrong in its exit code."""

from __future__ import annotations

import datetime as dt
import logging
import os
from collections.abc import Callable, Iterator
from pathlib import Path

import pandas as pd
import pytest

from monitor import scheduler
from monitor.calendar import as_of_for, business_days_between
from monitor.cli import main
from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.pipeline import collect_inbox, ingest_file, init_store, run_daily, run_days
from monitor.pipeline.store import schedule_of
from monitor.trigger import previous_fire_time
from storage import Store
from storage import alerts as alerts_store
from storage import closes as closes_store
from storage import outbox as outbox_store
from storage import runs as runs_store
from tests.conftest import RecordingRelay
from tests.scenarios import INSTRUMENTS, RULES, break_scenario, digest_section

SCHEDULE = """
[schedule]
days = ["mon", "tue", "wed", "thu", "fri"]
time = "18:30"
"""
HISTORY_END = dt.date(2023, 12, 15)
WEEK = [dt.date(2023, 12, d) for d in (18, 19, 20, 21, 22)]


@pytest.fixture(autouse=True)
def _comove_logger_restored() -> Iterator[None]:
    """`main` and `run_daily_command` attach handlers to the "comove" logger bound to this
    test's streams; put the logger back so later tests do not write to closed streams."""
    logger = logging.getLogger("comove")
    saved = (list(logger.handlers), logger.level, logger.propagate)
    yield
    for handler in logger.handlers[:]:
        if handler not in saved[0]:
            logger.removeHandler(handler)
            handler.close()
    logger.handlers[:] = saved[0]
    logger.setLevel(saved[1])
    logger.propagate = saved[2]


class FlakyRelay(RecordingRelay):
    """A relay that answers 451 (try again later) while `down` is set."""

    down = False

    async def handle_DATA(self, server: object, session: object, envelope: object) -> str:
        if self.down:
            return "451 4.3.0 mail system down for maintenance"
        return await super().handle_DATA(server, session, envelope)


@pytest.fixture
def flaky() -> Iterator[FlakyRelay]:
    server = FlakyRelay()
    server.start()
    yield server
    server.stop()


@pytest.fixture(scope="module")
def closes() -> pd.DataFrame:
    frame = generate(break_scenario()).closes
    frame.index.name = "date"
    return frame




@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings], closes: pd.DataFrame,
         flaky: FlakyRelay) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SCHEDULE + digest_section(flaky.port))
    store = init_store(settings)
    history = tmp_path / "history.csv"
    closes.loc[: pd.Timestamp(HISTORY_END)].to_csv(history, date_format="%Y-%m-%d")
    ingest_file(store, settings, history, today=HISTORY_END)
    yield store, settings
    store.dispose()


def _drop(settings: Settings, closes: pd.DataFrame, day: dt.date, name: str = "") -> Path:
    row = closes.loc[pd.Timestamp(day)]
    path = settings.inbox / (name or f"closes-{day}.csv")
    settings.inbox.mkdir(parents=True, exist_ok=True)
    lines = ["date,symbol,close"] + [f"{day},{s},{v}" for s, v in row.items() if pd.notna(v)]
    path.write_text("\n".join(lines) + "\n")
    return path


def _stored_days(store: Store) -> list[dt.date]:
    with store.connect() as conn:
        frame = closes_store.read_closes_long(conn, ["KLV", "DUNQ", "TEZ10"], WEEK[0], WEEK[-1])
    return sorted({ts.date() for ts in pd.to_datetime(frame["date"])})


def _feed_alerts(store: Store) -> list[alerts_store.AlertRow]:
    with store.connect() as conn:
        return alerts_store.list_alerts(conn, rule="data-feed")


def test_a_failed_email_does_not_cost_the_next_day_its_closes(
    desk: tuple[Store, Settings], closes: pd.DataFrame, flaky: FlakyRelay
) -> None:
    store, settings = desk
    now = dt.datetime(2023, 12, 19, 17, 30, tzinfo=dt.UTC)
    _drop(settings, closes, WEEK[0])
    assert run_days(store, settings, WEEK[0], environ={})[0].status == "done"
    flaky.down = True
    _drop(settings, closes, WEEK[1])
    failed = run_days(store, settings, WEEK[1], environ={}, now=now)
    # The day's closes and alerts are in; only its email is owed.
    assert [r.status for r in failed] == ["failed"]
    assert "451" in failed[0].digest_error and "outbox" in failed[0].message
    assert _stored_days(store) == WEEK[:2]
    flaky.down = False
    _drop(settings, closes, WEEK[2])
    # The next evening catches up the 19th (its inbox read against the 20th, so the
    # 20th's file is not refused as future) and then runs the 20th.
    later = run_days(store, settings, WEEK[2], environ={},
                     now=now + dt.timedelta(days=1))
    assert [(r.as_of, r.status) for r in later] == [(WEEK[1], "done"), (WEEK[2], "done")]
    assert not (settings.inbox / "rejected").exists()
    assert _stored_days(store) == WEEK[:3]
    assert _feed_alerts(store) == []
    with store.connect() as conn:
        assert all(outbox_store.sent_for(conn, day) is not None for day in WEEK[:3])
        assert outbox_store.unsent(conn) == []
    assert len(flaky.messages) == 3


def test_a_digest_still_owed_after_later_days_ran_is_retried_first(
    desk: tuple[Store, Settings], closes: pd.DataFrame, flaky: FlakyRelay
) -> None:
    store, settings = desk
    flaky.down = True
    for day in WEEK[:2]:
        _drop(settings, closes, day)
    first = run_days(store, settings, WEEK[1], environ={})
    # Mail is down all evening: both days run (the 18th caught up), both digests wait.
    assert [(r.as_of, r.status) for r in first] == [(WEEK[0], "failed"), (WEEK[1], "failed")]
    flaky.down = False
    run_daily(store, settings, WEEK[2], send=False)  # a later day done by hand, no email
    _drop(settings, closes, WEEK[3])
    reports = run_days(store, settings, WEEK[3], environ={})
    assert [(r.as_of, r.status) for r in reports] == [
        (WEEK[0], "retried"), (WEEK[1], "retried"), (WEEK[3], "done")]
    with store.connect() as conn:
        assert outbox_store.unsent(conn) == []
        assert all(outbox_store.sent_for(conn, day) is not None for day in WEEK[:2])
    assert len(flaky.messages) == 3


def test_the_inbox_is_read_against_the_real_today_not_the_day_being_run(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    _drop(settings, closes, WEEK[0])
    _drop(settings, closes, WEEK[1])
    # A rerun of the 18th with the 19th's file already delivered: both are accepted.
    report = run_daily(store, settings, WEEK[0], send=False,
                       now=dt.datetime(2023, 12, 19, 17, 0, tzinfo=dt.UTC))
    assert report.collected is not None
    assert len(report.collected.accepted) == 2 and report.collected.rejected == []
    assert _stored_days(store) == WEEK[:2]


def test_inbox_files_are_ingested_in_date_order_whatever_their_names(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    _drop(settings, closes, WEEK[1], name="a-feed.csv")
    _drop(settings, closes, WEEK[0], name="b-feed.csv")
    # The same day restated by a file dropped later, named before the original.
    original = float(closes.loc[pd.Timestamp(WEEK[1]), "KLV"])
    restated = settings.inbox / "0-correction.csv"
    restated.write_text(f"date,symbol,close\n{WEEK[1]},KLV,{original * 1.01}\n")
    later = (settings.inbox / "a-feed.csv").stat().st_mtime + 5
    os.utime(restated, (later, later))
    report = collect_inbox(store, settings, today=WEEK[1])
    assert [Path(r.file).name for r in report.accepted] == [
        "b-feed.csv", "a-feed.csv", "0-correction.csv"]
    assert report.accepted[-1].closes_restated == 1
    with store.connect() as conn:
        frame = closes_store.read_closes_long(conn, ["KLV"], WEEK[1], WEEK[1])
    assert float(frame["close"].iloc[0]) == pytest.approx(original * 1.01)


def _config_args(settings: Settings, *args: str) -> list[str]:
    assert settings.path is not None
    return [args[0], "--config", str(settings.path), *args[1:]]


def test_run_once_exit_codes_tell_data_problems_from_email_failures(
    desk: tuple[Store, Settings], closes: pd.DataFrame, flaky: FlakyRelay,
    capsys: pytest.CaptureFixture[str]
) -> None:
    store, settings = desk
    _drop(settings, closes, WEEK[0])
    assert main(_config_args(settings, "run", "--once", "--as-of", str(WEEK[0]))) == 0
    _drop(settings, closes, WEEK[1])
    (settings.inbox / "broken.csv").write_text(f"date,symbol,close\n{WEEK[1]},KLV,n/a\n")
    assert main(_config_args(settings, "run", "--once", "--as-of", str(WEEK[1]))) == (
        scheduler.EXIT_DATA)
    # No closes at all on the 20th: the data-feed alert is a data problem too.
    assert main(_config_args(settings, "run", "--once", "--as-of", str(WEEK[2]))) == (
        scheduler.EXIT_DATA)
    flaky.down = True
    _drop(settings, closes, WEEK[3])
    assert main(_config_args(settings, "run", "--once", "--as-of", str(WEEK[3]))) == (
        scheduler.EXIT_EMAIL)
    assert "not sent" in capsys.readouterr().err


def test_run_catches_up_missed_days_at_start_in_a_store_that_never_ran(
    tmp_path: Path, write_settings: Callable[..., Settings], closes: pd.DataFrame,
    monkeypatch: pytest.MonkeyPatch
) -> None:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SCHEDULE)
    schedule = schedule_of(settings)
    fired = previous_fire_time(schedule, dt.datetime.now(schedule.zone))
    assert fired is not None
    through = as_of_for(fired, schedule)
    # Closes ending two scheduled run dates before the latest fire's date.
    dates = pd.bdate_range(end=pd.Timestamp(through) - pd.offsets.BDay(2), periods=300)
    history = closes.iloc[-300:].copy()
    history.index = dates
    history.index.name = "date"
    path = tmp_path / "history.csv"
    history.to_csv(path, date_format="%Y-%m-%d")
    store = init_store(settings)
    ingest_file(store, settings, path)
    started: list[object] = []
    monkeypatch.setattr(scheduler, "run_scheduler", lambda *a, **k: started.append(a))
    assert scheduler.run_daily_command(store, settings, once=False, as_of=None, force=False,
                                       catch_up=True) == 0
    missed = business_days_between(schedule, dates[-1].date(), through)
    assert len(missed) == 2
    with store.connect() as conn:
        ran = sorted(r.as_of for r in runs_store.list_runs(conn, kind="daily", status="done"))
    assert ran == missed
    assert len(started) == 1  # and then the scheduler process starts
    store.dispose()


def test_run_names_where_the_schedule_state_is_kept_in_our_words(
    tmp_path: Path, write_settings: Callable[..., Settings], monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """The start-up line says what is kept (the next run time) and where, in the desk's
    words, not the scheduling library's "job store"."""
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SCHEDULE)
    store = init_store(settings)
    monkeypatch.setattr(scheduler, "run_scheduler", lambda *a, **k: None)
    assert scheduler.run_daily_command(store, settings, once=False, as_of=None, force=False,
                                       catch_up=False) == 0
    store.dispose()
    err = capsys.readouterr().err
    kept = f"schedule state (next run time) kept in sqlite:///{tmp_path / 'store-schedule.sqlite'}"
    assert kept in err
    assert "job store" not in err.lower()
