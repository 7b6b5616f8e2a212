"""Rules over history: planted regimes open and clear the expected alerts, and a backfill is
idempotent, keeps acknowledgements, resumes after a kill and recomputes after a restatement."""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.pipeline import acknowledge, evaluate_range, ingest_file, init_store, mute
from storage import Store
from storage import alerts as alerts_store
from tests.scenarios import BREAK_END, BREAK_START, END, INSTRUMENTS, RULES, break_scenario


@pytest.fixture(scope="module")
def closes_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    path = tmp_path_factory.mktemp("closes") / "closes.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    return path


@pytest.fixture
def desk(store_url: str, write_settings: Callable[..., Settings],
         closes_csv: Path) -> Iterator[tuple[Store, Settings]]:
    settings = write_settings(store_url, INSTRUMENTS + RULES)
    store = init_store(settings)
    ingest_file(store, settings, closes_csv, today=dt.date(2024, 1, 5))
    yield store, settings
    store.dispose()


def _round(row: tuple[object, ...]) -> tuple[object, ...]:
    # The engine agrees with itself to 1e-12 whatever row a pass starts from (its
    # accuracy contract), not bit for bit: a resumed pass may differ in the last digits.
    return tuple(round(v, 11) if isinstance(v, float) else v for v in row)


def _history(store: Store) -> tuple[list[tuple[object, ...]], list[tuple[object, ...]]]:
    """Alerts and events as comparable tuples (database ids of events left out)."""
    with store.connect() as conn:
        alerts = alerts_store.list_alerts(conn)
        events = alerts_store.events_for(conn)
    by_id = {a.id: (a.rule, a.target, a.opened_on) for a in alerts}
    alert_rows = sorted(_round((a.id, a.rule, a.target, a.opened_on, a.state, a.cleared_on,
                                a.peak_value, a.last_value)) for a in alerts)
    event_rows = sorted(_round((by_id[e["alert_id"]], e["date"], e["event"], e["value"],
                                e["level"], e["low"], e["high"], e["n"], e["days_held"],
                                e["announce"]))
                        for e in events)
    return alert_rows, event_rows


def _reference_opening(closes_csv: Path) -> tuple[dt.date, dt.date]:
    """First day pandas' rolling(21) correlation of log returns is below 0.3 for three
    days running, and the first day after it above 0.45: an independent computation of
    when the level rule must open and clear (pandas as the general-purpose reference)."""
    closes = pd.read_csv(closes_csv, index_col="date", parse_dates=True)
    returns = np.log(closes).diff().iloc[1:]
    corr = returns["KLV"].rolling(21).corr(returns["DUNQ"])
    below = (corr < 0.3).astype(int)
    streak = below.groupby((below == 0).cumsum()).cumsum()
    opened = streak[streak >= 3].index[0]
    cleared = corr[(corr.index > opened) & (corr > 0.45)].index[0]
    return opened.date(), cleared.date()


def test_planted_break_opens_within_hold_days_and_clears_after_it_ends(
    desk: tuple[Store, Settings], closes_csv: Path
) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    with store.connect() as conn:
        breaks = [a for a in alerts_store.list_alerts(conn) if a.rule == "hedge-break"]
    expected_open, expected_clear = _reference_opening(closes_csv)
    inside = [a for a in breaks if BREAK_START <= a.opened_on <= BREAK_END]
    assert len(inside) == 1, breaks
    alert = inside[0]
    assert alert.opened_on == expected_open
    # A 21-day window plus a hold of 3 bounds how late the break can be seen.
    assert (alert.opened_on - BREAK_START).days <= 31 + 3 + 10
    assert alert.first_breach_on < alert.opened_on
    assert alert.state == "cleared" and alert.cleared_on == expected_clear
    assert alert.cleared_on > BREAK_END
    assert alert.peak_value is not None and alert.peak_value < 0.3


def test_backfill_twice_gives_identical_history(desk: tuple[Store, Settings]) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    first = _history(store)
    again = evaluate_range(store, settings, None, None)
    assert again.already_done
    evaluate_range(store, settings, None, None, force=True)
    assert _history(store) == first
    assert first[0], "the planted break must have produced alerts"


def test_backfill_after_acknowledging_keeps_the_acknowledgement(
    desk: tuple[Store, Settings]
) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    before = _history(store)
    alert_id = before[0][0][0]
    acknowledge(store, settings, int(alert_id), by="R. Vell", note="desk knows",
                now=dt.datetime(2024, 1, 5, 9, tzinfo=dt.UTC))
    evaluate_range(store, settings, dt.date(2022, 6, 1), None, force=True)
    assert _history(store) == before
    with store.connect() as conn:
        alert = alerts_store.get_alert(conn, int(alert_id))
    assert alert is not None and alert.acknowledged_by == "R. Vell"
    assert alert.acknowledged_note == "desk knows"


def test_range_in_two_parts_equals_one_run(desk: tuple[Store, Settings],
                                           store_url: str) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, dt.date(2023, 4, 10))
    second = evaluate_range(store, settings, None, None)
    assert second.resumed_from == dt.date(2023, 4, 10)
    split = _history(store)
    evaluate_range(store, settings, None, None, force=True)
    assert _history(store) == split


def test_muted_pair_is_recorded_but_not_announced(desk: tuple[Store, Settings]) -> None:
    store, settings = desk
    mute(store, settings, rule=None, pair="DUNQ/KLV", until=dt.date(2030, 1, 1),
         reason="hedge being rebuilt", now=dt.datetime(2022, 1, 3, tzinfo=dt.UTC))
    evaluate_range(store, settings, None, None)
    with store.connect() as conn:
        events = alerts_store.events_for(conn)
    assert events and not any(e["announce"] for e in events)


def test_restated_close_makes_the_next_evaluation_replay(
    desk: tuple[Store, Settings], tmp_path: Path
) -> None:
    store, settings = desk
    evaluate_range(store, settings, None, None)
    before = _history(store)
    fix = tmp_path / "fix.csv"
    fix.write_text("date,symbol,close\n2023-03-15,KLV,1000\n")
    ingest_file(store, settings, fix, today=dt.date(2024, 1, 5))
    report = evaluate_range(store, settings, None, None)
    assert report.resumed_from is None and report.days_written > 0
    assert _history(store) != before


def _cli(config: Path, *args: str, env: dict[str, str] | None = None
         ) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "monitor", *args, "--config", str(config)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, **(env or {})})


@pytest.mark.slow
def test_killed_backfill_rerun_equals_one_clean_run(
    tmp_path: Path, closes_csv: Path, write_settings: Callable[..., Settings]
) -> None:
    killed = write_settings(f"sqlite:///{tmp_path / 'killed.sqlite'}", INSTRUMENTS + RULES)
    store = init_store(killed)
    ingest_file(store, killed, closes_csv, today=dt.date(2024, 1, 5))
    slow = {"COMOVE_COMMIT_DAYS": "5"}
    proc = _cli(tmp_path / "comove.toml", "backfill", env=slow)
    deadline = time.monotonic() + 60
    committed = None
    while time.monotonic() < deadline and proc.poll() is None:
        with store.connect() as conn:
            events = alerts_store.events_for(conn)
        if events:
            committed = max(e["date"] for e in events)
            break
        time.sleep(0.01)
    assert proc.poll() is None, "backfill ended before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=30)
    assert committed is not None and committed < END
    rerun = _cli(tmp_path / "comove.toml", "backfill")
    out, err = rerun.communicate(timeout=120)
    assert rerun.returncode == 0, err
    assert "resumed" in out
    killed_history = _history(store)
    store.dispose()

    (tmp_path / "clean").mkdir()
    clean_toml = tmp_path / "clean" / "comove.toml"
    text = (tmp_path / "comove.toml").read_text()
    clean_toml.write_text(text.replace("killed.sqlite", "clean.sqlite"))
    clean_proc = _cli(clean_toml, "init")
    clean_proc.communicate(timeout=60)
    for args in (("ingest", str(closes_csv)), ("backfill",)):
        step = _cli(clean_toml, *args)
        _, step_err = step.communicate(timeout=120)
        assert step.returncode == 0, step_err
    from monitor.config import load_settings
    from monitor.pipeline import open_settings_store

    clean_store = open_settings_store(load_settings(clean_toml))
    assert _history(clean_store) == killed_history
    clean_store.dispose()


@pytest.mark.slow
def test_ctrl_c_keeps_what_was_committed_and_a_rerun_resumes(
    tmp_path: Path, closes_csv: Path, write_settings: Callable[..., Settings]
) -> None:
    from storage import runs as runs_store

    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", INSTRUMENTS + RULES)
    store = init_store(settings)
    ingest_file(store, settings, closes_csv, today=dt.date(2024, 1, 5))
    proc = _cli(tmp_path / "comove.toml", "backfill", "--no-pages",
                env={"COMOVE_COMMIT_DAYS": "5"})
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        with store.connect() as conn:
            if alerts_store.events_for(conn):
                break
        time.sleep(0.01)
    assert proc.poll() is None, "backfill ended before it could be interrupted"
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130
    assert "Interrupted; every step already committed is kept." in err
    assert "Traceback" not in err
    with store.connect() as conn:
        statuses = [r.status for r in runs_store.list_runs(conn, kind="backfill")]
        kept = len(alerts_store.events_for(conn))
    assert statuses == ["interrupted"] and kept > 0
    rerun = _cli(tmp_path / "comove.toml", "backfill", "--no-pages")
    out, err = rerun.communicate(timeout=120)
    assert rerun.returncode == 0, err
    assert "resumed after" in out
    store.dispose()
