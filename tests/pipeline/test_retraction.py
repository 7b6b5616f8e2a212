"""An announced alert is never deleted: when a restatement removes its condition it is kept
as retracted, with the reason and the restatement's batch, listed in the next digest, its
id and acknowledgement notes kept. An alert nobody saw (never in a digest, never
acknowledged) still goes away."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.pipeline import acknowledge, backfill, ingest_file, init_store, run_daily
from storage import Store
from storage import alerts as alerts_store
from storage import closes as closes_store
from tests.scenarios import INSTRUMENTS, SPIKE_RULE, WEEKDAY_SCHEDULE

SCHEDULE = WEEKDAY_SCHEDULE
DATES = pd.bdate_range("2024-01-02", periods=120)
SPIKE = DATES[100].date()  # a bad tick in KLV and TEZ10 on the same day
NEXT = DATES[101].date()


@pytest.fixture(scope="module")
def closes() -> pd.DataFrame:
    """Three unrelated random walks; KLV and TEZ10 both 15 % up on SPIKE and back after."""
    rng = np.random.default_rng(19)
    steps = rng.normal(0.0, 0.01, size=(len(DATES), 3))
    frame = pd.DataFrame(100 * np.exp(np.cumsum(steps, axis=0)), index=DATES,
                         columns=["KLV", "DUNQ", "TEZ10"])
    frame.index.name = "date"
    frame.loc[DATES[100], ["KLV", "TEZ10"]] *= 1.15
    return frame


@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings],
         closes: pd.DataFrame) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + SPIKE_RULE + SCHEDULE)
    store = init_store(settings)
    history = tmp_path / "history.csv"
    closes.loc[:pd.Timestamp(SPIKE)].to_csv(history, date_format="%Y-%m-%d")
    ingest_file(store, settings, history)
    yield store, settings
    store.dispose()


def _restate_and_next_day(settings: Settings, closes: pd.DataFrame) -> Path:
    """The feed's correction of the bad tick, and the next day's closes, in the inbox."""
    settings.inbox.mkdir(parents=True, exist_ok=True)
    fixed = closes.loc[pd.Timestamp(SPIKE), ["KLV", "TEZ10"]] / 1.15
    correction = settings.inbox / "correction.csv"
    correction.write_text("date,symbol,close\n" + "".join(
        f"{SPIKE},{symbol},{value}\n" for symbol, value in fixed.items()))
    row = closes.loc[pd.Timestamp(NEXT)]
    (settings.inbox / f"closes-{NEXT}.csv").write_text("date,symbol,close\n" + "".join(
        f"{NEXT},{symbol},{value}\n" for symbol, value in row.items()))
    return correction


def _spike_alerts(store: Store) -> list[alerts_store.AlertRow]:
    with store.connect() as conn:
        return alerts_store.list_alerts(conn, rule="spike-level")


def test_an_announced_alert_is_retracted_with_its_reason_and_listed_next_evening(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    first = run_daily(store, settings, SPIKE, send=False)
    assert first.digest is not None
    [alert] = [a for a in _spike_alerts(store) if a.opened_on == SPIKE]
    assert alert.state == "open"
    assert "spike-level" in (first.digest.folder / "digest.txt").read_text()  # announced
    _restate_and_next_day(settings, closes)

    report = run_daily(store, settings, NEXT, send=False)
    assert report.collected is not None and len(report.collected.accepted) == 2
    kept = [a for a in _spike_alerts(store) if a.id == alert.id]
    assert kept, "the announced alert was deleted"
    [row] = kept
    assert row.state == "retracted" and row.retracted_on == NEXT
    with store.connect() as conn:
        batches = closes_store.list_batches(conn)
    [correction] = [b for b in batches if b.file_name.endswith("correction.csv")]
    assert row.retracted_batch == correction.id
    assert row.retracted_reason is not None
    assert f"ingest batch {correction.id}, correction.csv" in row.retracted_reason
    assert f"closes from {SPIKE} on were restated" in row.retracted_reason
    # The next evening's digest says so, with the id.
    text = (report.digest.folder / "digest.txt").read_text() if report.digest else ""
    assert "retracted" in text and f"alert {alert.id} (spike-level" in text
    html = (report.digest.folder / "digest.html").read_text() if report.digest else ""
    assert f"alert {alert.id} (spike-level, opened {SPIKE}) retracted" in html
    # Not open on any day any more, and not listed again the evening after.
    with store.connect() as conn:
        assert all(a.id != alert.id for a in alerts_store.list_alerts(conn, open_on=SPIKE))
    later = run_daily(store, settings, DATES[102].date(), send=False)
    assert later.digest is not None
    assert f"alert {alert.id} (spike-level" not in (later.digest.folder / "digest.txt").read_text()


def test_an_acknowledged_alert_keeps_its_note_when_retracted(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    backfill(store, settings, None, None)  # from the shell: no digest yet
    [alert] = [a for a in _spike_alerts(store) if a.opened_on == SPIKE]
    acknowledge(store, settings, alert.id, by="R. Vell", note="bad tick, feed asked")
    _restate_and_next_day(settings, closes)
    run_daily(store, settings, NEXT, send=False)
    [row] = [a for a in _spike_alerts(store) if a.id == alert.id]
    assert row.state == "retracted" and row.retracted_batch is not None
    assert (row.acknowledged_by, row.acknowledged_note) == ("R. Vell", "bad tick, feed asked")


def test_an_alert_nobody_saw_goes_away_without_a_trace(
    desk: tuple[Store, Settings], closes: pd.DataFrame
) -> None:
    store, settings = desk
    backfill(store, settings, None, None)  # evaluated from the shell, never in a digest
    assert any(a.opened_on == SPIKE for a in _spike_alerts(store))
    correction = _restate_and_next_day(settings, closes)
    ingest_file(store, settings, correction)
    backfill(store, settings, None, None)
    assert all(a.opened_on != SPIKE for a in _spike_alerts(store))


def test_the_day_of_a_retraction_from_the_shell_is_today_so_the_next_digest_lists_it() -> None:
    from monitor.pipeline.evaluate import _retraction

    saved = alerts_store.SavedState("scope", SPIKE, 3, {})
    now = dt.datetime(2030, 1, 2, 9, 0, tzinfo=dt.UTC)
    shell = _retraction(None, saved, None, True, "backfill", SPIKE, now)
    assert shell.on == now.date() and "forced rerun" in shell.reason
    evening = _retraction(None, saved, None, False, "evaluation", SPIKE, now)
    assert evening.on == SPIKE


def test_the_pair_page_tells_the_retraction_and_why(
    desk: tuple[Store, Settings], closes: pd.DataFrame, tmp_path: Path
) -> None:
    from bs4 import BeautifulSoup

    from monitor.pipeline import build_pages

    store, settings = desk
    run_daily(store, settings, SPIKE, send=False)
    [alert] = [a for a in _spike_alerts(store) if a.opened_on == SPIKE]
    _restate_and_next_day(settings, closes)
    run_daily(store, settings, NEXT, send=False)
    site = tmp_path / "site"
    build_pages(store, settings, site)
    rows = []
    for page in (site / "pairs").glob("*.html"):
        soup = BeautifulSoup(page.read_text(encoding="utf-8"), "html.parser")
        rows += [row for row in soup.select("tr.event-row[data-kind=retracted]")]
    [row] = rows
    cells = [cell.get_text(" ", strip=True) for cell in row.find_all("td")]
    assert cells[0] == str(NEXT) and str(alert.id) in cells[1]
    assert cells[3].startswith("retracted (a rerun no longer produces it): closes from "
                               f"{SPIKE} on were restated")
    assert "correction.csv" in cells[3]
