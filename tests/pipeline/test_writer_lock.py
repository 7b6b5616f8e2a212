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
