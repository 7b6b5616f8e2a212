"""Fault injection over a week of evening runs: the mail relay down on day 2, a poisoned
file on day 3, a restatement on day 4. Every day's closes, alerts and digest come out
right: no day loses its closes, no false data-feed alert, every digest sent exactly once,
the bad file set aside with its problems, the alert the restatement removes retracted and
listed."""

from __future__ import annotations

import datetime as dt
import email
import email.policy
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.pipeline import DailyReport, ingest_file, init_store, run_days
from monitor.scheduler import EXIT_DATA, EXIT_EMAIL, once_exit_code
from storage import Store
from storage import alerts as alerts_store
from storage import closes as closes_store
from storage import outbox as outbox_store
from tests.pipeline.test_evening_faults import FlakyRelay
from tests.scenarios import INSTRUMENTS, SPIKE_RULE, WEEKDAY_SCHEDULE, digest_section

RULES = SPIKE_RULE
SCHEDULE = WEEKDAY_SCHEDULE
DATES = pd.bdate_range("2024-01-02", periods=105)
WEEK = [d.date() for d in DATES[100:105]]
SYMBOLS = ["KLV", "DUNQ", "TEZ10"]


@pytest.fixture(scope="module")
def closes() -> pd.DataFrame:
    """Unrelated random walks; on day 1 of the week KLV and TEZ10 carry a bad tick (15 %
    up, back the next day) that the feed restates on day 4."""
    rng = np.random.default_rng(7)
    steps = rng.normal(0.0, 0.01, size=(len(DATES), 3))
    frame = pd.DataFrame(100 * np.exp(np.cumsum(steps, axis=0)), index=DATES, columns=SYMBOLS)
    frame.index.name = "date"
    return frame


@pytest.fixture
def relay() -> Iterator[FlakyRelay]:
    server = FlakyRelay()
    server.start()
    yield server
    server.stop()


@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings], closes: pd.DataFrame,
         relay: FlakyRelay) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SCHEDULE + digest_section(relay.port))
    store = init_store(settings)
    history = tmp_path / "history.csv"
    closes.loc[: DATES[99]].to_csv(history, date_format="%Y-%m-%d")
    ingest_file(store, settings, history)
    yield store, settings
    store.dispose()


def _write(path: Path, rows: list[tuple[dt.date, str, float]]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("date,symbol,close\n" + "".join(f"{d},{s},{v!r}\n" for d, s, v in rows))


def _day_file(settings: Settings, closes: pd.DataFrame, day: dt.date,
              bump: float = 1.0) -> None:
    row = closes.loc[pd.Timestamp(day)]
    _write(settings.inbox / f"closes-{day}.csv",
           [(day, s, float(row[s]) * (bump if s in ("KLV", "TEZ10") else 1.0))
            for s in SYMBOLS])


def _evening(day: dt.date) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(17, 45), tzinfo=dt.UTC)  # 18:45 in Berlin


def _stored(store: Store, day: dt.date) -> dict[str, float]:
    with store.connect() as conn:
        frame = closes_store.read_closes_long(conn, SYMBOLS, day, day)
    return {str(r.symbol): float(r.close) for r in frame.itertuples()}


def _subjects_and_texts(relay: FlakyRelay) -> list[tuple[str, str]]:
    out = []
    for raw in relay.messages:
        message = email.message_from_bytes(raw, policy=email.policy.default)
        plain = message.get_body(preferencelist=("plain",))
        out.append((str(message["Subject"]), plain.get_content() if plain else ""))
    return out


def test_a_week_with_a_mail_outage_a_poisoned_file_and_a_restatement(
    desk: tuple[Store, Settings], closes: pd.DataFrame, relay: FlakyRelay
) -> None:
    store, settings = desk
    reports: dict[dt.date, list[DailyReport]] = {}

    # Day 1: the day's file carries the bad tick; the spike alert opens and is announced.
    _day_file(settings, closes, WEEK[0], bump=1.15)
    reports[WEEK[0]] = run_days(store, settings, WEEK[0], environ={}, now=_evening(WEEK[0]))
    with store.connect() as conn:
        [spike] = [a for a in alerts_store.list_alerts(conn, rule="spike-level")
                   if a.opened_on == WEEK[0]]

    # Day 2: the relay is down all evening.
    relay.down = True
    _day_file(settings, closes, WEEK[1])
    reports[WEEK[1]] = run_days(store, settings, WEEK[1], environ={}, now=_evening(WEEK[1]))
    relay.down = False

    # Day 3: a second vendor's file is poisoned (a close of 1e-320); the day's own file
    # is fine. The 2nd is caught up first (its digest sent from the outbox).
    _day_file(settings, closes, WEEK[2])
    _write(settings.inbox / "vendor-b.csv", [(WEEK[2], "DUNQ", 1e-320)])
    reports[WEEK[2]] = run_days(store, settings, WEEK[2], environ={}, now=_evening(WEEK[2]))

    # Day 4: the feed restates day 1's bad tick along with the day's closes.
    fixed = closes.loc[pd.Timestamp(WEEK[0])]
    _write(settings.inbox / "restatement.csv",
           [(WEEK[0], s, float(fixed[s])) for s in ("KLV", "TEZ10")])
    _day_file(settings, closes, WEEK[3])
    reports[WEEK[3]] = run_days(store, settings, WEEK[3], environ={}, now=_evening(WEEK[3]))

    # Day 5: an ordinary evening.
    _day_file(settings, closes, WEEK[4])
    reports[WEEK[4]] = run_days(store, settings, WEEK[4], environ={}, now=_evening(WEEK[4]))

    # What each evening ran and how it ended.
    ran = {day: [(r.as_of, r.status) for r in rs] for day, rs in reports.items()}
    assert ran == {
        WEEK[0]: [(WEEK[0], "done")],
        WEEK[1]: [(WEEK[1], "failed")],
        WEEK[2]: [(WEEK[1], "done"), (WEEK[2], "done")],
        WEEK[3]: [(WEEK[3], "done")],
        WEEK[4]: [(WEEK[4], "done")],
    }
    codes = {day: once_exit_code(rs) for day, rs in reports.items()}
    assert codes == {WEEK[0]: 0, WEEK[1]: EXIT_EMAIL, WEEK[2]: EXIT_DATA, WEEK[3]: 0,
                     WEEK[4]: 0}

    # Closes: every day complete, the poisoned value never stored, day 1 restated.
    for k, day in enumerate(WEEK):
        expected = {s: float(closes.loc[pd.Timestamp(day), s]) for s in SYMBOLS}
        assert _stored(store, day) == pytest.approx(expected), (k, day)
    rejected = settings.inbox / "rejected"
    assert sorted(p.name for p in rejected.iterdir()) == [
        "vendor-b.csv", "vendor-b.csv.problems.txt"]
    assert "vendor-b.csv:2" in (rejected / "vendor-b.csv.problems.txt").read_text()

    # Alerts: no data-feed alert on any day; the spike alert kept as retracted on day 4
    # with the restatement's batch, and nothing else from the bad tick survives.
    with store.connect() as conn:
        assert alerts_store.list_alerts(conn, rule="data-feed") == []
        row = alerts_store.get_alert(conn, spike.id)
        others = [a for a in alerts_store.list_alerts(conn, rule="spike-level")
                  if a.id != spike.id and a.state != "retracted"]
        batches = {b.id: Path(b.file_name).name for b in closes_store.list_batches(conn)}
    assert row is not None and row.state == "retracted" and row.retracted_on == WEEK[3]
    assert row.retracted_batch is not None and batches[row.retracted_batch] == "restatement.csv"
    assert others == []

    # Digests: one per day, each sent exactly once, in order, none left in the outbox.
    with store.connect() as conn:
        assert outbox_store.unsent(conn) == []
        sent = [outbox_store.sent_for(conn, day) for day in WEEK]
    assert all(r is not None and r.status == "sent" for r in sent)
    mails = _subjects_and_texts(relay)
    assert len(mails) == 5
    for (subject, _), day in zip(mails, WEEK, strict=True):
        assert f"correlation digest {day.isoformat()}" in subject, subject
        assert "check data first" not in subject  # no false data alarm on any evening
    texts = [text for _, text in mails]
    assert "spike-level" in texts[0]  # announced on day 1
    assert f"alert {spike.id} (spike-level, opened {WEEK[0]}) retracted" in texts[3]
    assert "restatement.csv" in texts[3]
    assert all("retracted" not in text for k, text in enumerate(texts) if k != 3)
    assert all("No closes for" not in text for text in texts)
