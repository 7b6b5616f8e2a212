"""Two writers at once, as two processes: the second waits for the store's writer lock with
one progress line, then either goes on or stops with one line (never an SQL dump)."""

from __future__ import annotations

import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import pytest

from monitor.config import Settings
from monitor.pipeline import init_store, read_closes
from tests.conftest import DESK_TOML

HOLD = """
import sys, time
from pathlib import Path
from monitor.config import load_settings
from monitor.pipeline import open_settings_store
store = open_settings_store(load_settings(sys.argv[1]))
with store.begin() as conn:
    Path(sys.argv[2]).write_text("held")
    time.sleep(float(sys.argv[3]))
store.dispose()
"""


def _hold_lock(settings: Settings, tmp_path: Path, seconds: float) -> subprocess.Popen[str]:
    ready = tmp_path / "held"
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(settings.path), str(ready),
                               str(seconds)], text=True)
    deadline = time.monotonic() + 60
    while not ready.exists():
        assert holder.poll() is None, "the lock holder died"
        assert time.monotonic() < deadline, "the lock holder never took the lock"
        time.sleep(0.05)
    return holder


def _ingest(settings: Settings, path: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", "ingest", str(path), "--config",
                           str(settings.path)], capture_output=True, text=True, timeout=120)


def test_a_second_writer_waits_for_the_first_and_then_writes(
    store_url: str, write_settings: Callable[..., Settings], tmp_path: Path
) -> None:
    settings = write_settings(store_url)
    init_store(settings).dispose()
    path = tmp_path / "p.csv"
    path.write_text("date,symbol,close\n2024-03-04,KLV,100\n", encoding="utf-8")
    holder = _hold_lock(settings, tmp_path, 10.0)
    started = time.monotonic()
    done = _ingest(settings, path)
    waited = time.monotonic() - started
    holder.wait(timeout=60)
    assert done.returncode == 0, done.stderr
    # Progress goes to the command's log (stdout), like every other progress line.
    assert "is busy with another writer; waiting up to 30 s" in done.stdout
    assert "store lock taken; continuing" in done.stdout
    assert waited > 1.0  # it did wait (the command itself starts in about a second)
    store = init_store(settings)
    assert read_closes(store).loc["2024-03-04", "KLV"] == 100.0
    store.dispose()


def test_a_writer_that_waits_too_long_stops_with_one_line(
    store_url: str, write_settings: Callable[..., Settings], tmp_path: Path
) -> None:
    settings = write_settings(store_url, DESK_TOML, "")
    # The [store] table is written by write_settings; the timeout goes into it.
    text = settings.path.read_text(encoding="utf-8").replace(
        "[store]\n", "[store]\nbusy_timeout = 1\n", 1)
    settings.path.write_text(text, encoding="utf-8")
    init_store(settings).dispose()
    path = tmp_path / "p.csv"
    path.write_text("date,symbol,close\n2024-03-04,KLV,100\n", encoding="utf-8")
    holder = _hold_lock(settings, tmp_path, 20.0)
    try:
        done = _ingest(settings, path)
    finally:
        holder.kill()
        holder.wait(timeout=60)
    assert done.returncode == 1
    assert done.stdout.splitlines() == [done.stdout.splitlines()[0]]
    assert "is busy with another writer; waiting up to 1 s" in done.stdout
    lines = done.stderr.splitlines()
    assert len(lines) == 1, done.stderr
    assert lines[0].startswith("Error: store ")
    assert lines[0].endswith("is locked by another writer (an ingest, a run or a backfill); "
                             "gave up after 1 s: try again when it has finished")
    assert "[SQL" not in done.stderr and "Traceback" not in done.stderr


@pytest.fixture(autouse=True)
def _no_debug(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("COMOVE_DEBUG", raising=False)


def test_ingests_during_a_backfill_wait_their_turn_and_both_finish(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    import datetime as dt
    import os

    from monitor.demo.synthetic import generate
    from monitor.pipeline import ingest_file
    from tests.scenarios import INSTRUMENTS, RULES, break_scenario

    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", INSTRUMENTS + RULES)
    store = init_store(settings)
    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    history = tmp_path / "history.csv"
    closes.to_csv(history, date_format="%Y-%m-%d")
    ingest_file(store, settings, history, today=dt.date(2024, 1, 5))
    # One commit per day: the backfill writes hundreds of times while the ingests run.
    env = {**os.environ, "COMOVE_COMMIT_DAYS": "1"}
    backfill = subprocess.Popen(
        [sys.executable, "-m", "monitor", "backfill", "--no-pages", "--config",
         str(settings.path)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    outcomes = []
    try:
        for k, day in enumerate(closes.index[300:303]):
            path = tmp_path / f"fix{k}.csv"
            value = float(closes.loc[day, "KLV"]) * 1.001
            path.write_text(f"date,symbol,close\n{day:%Y-%m-%d},KLV,{value!r}\n",
                            encoding="utf-8")
            outcomes.append((_ingest(settings, path), backfill.poll() is None))
    finally:
        out, err = backfill.communicate(timeout=600)
    assert backfill.returncode == 0, err
    assert "Traceback" not in err and "[SQL" not in err
    assert any(running for _, running in outcomes), "the backfill ended before any ingest"
    for done, _ in outcomes:
        assert done.returncode == 0, done.stderr
        assert "1 restated" in done.stdout
    store.dispose()
