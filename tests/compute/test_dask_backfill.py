"""A backfill whose pair tiles run on a real Dask cluster (worker processes) stores exactly
the alerts and events of the same backfill in one process, on a panel with gaps and
several rule kinds; an unreachable scheduler is a one-line error and nothing is written.

Kept small (12 instruments, 320 days, tiles of 4 instruments: 6 tiles): CI has 2 cores.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from pathlib import Path

# dask is in the test extra: CI runs these for real (an ImportError fails, never skips)
import distributed
import numpy as np
import pandas as pd
import pytest

from monitor.alerts.tiles import tileable
from monitor.config import Settings
from monitor.errors import ComoveError
from monitor.pipeline import build_plan, evaluate_range, ingest_file, init_store
from storage import Store
from storage import alerts as alerts_store
from storage import runs as runs_store

SYMBOLS = [f"HQ{k:02d}" for k in range(12)]
DAYS = 320

RULES = """
[[rules]]
name = "low-corr"
kind = "level"
measure = "rolling:21"
all = true
below = 0.05
hold = 2

[[rules]]
name = "high-corr-band"
kind = "level"
measure = "ewma:hl=10"
group = "north"
above = 0.25
require_band = true

[[rules]]
name = "fast-move"
kind = "jump"
measure = "rolling:21"
between = ["north", "south"]
delta = 0.35
over_days = 5

[[rules]]
name = "flip"
kind = "sign"
measure = "rolling:42"
group = "south"
expected = "positive"

[[rules]]
name = "moved"
kind = "shift"
measure = "rolling:21"
baseline = "rolling:84"
all = true
z = 2.0

[[rules]]
name = "north-average"
kind = "group-average"
measure = "rolling:21"
group = "north"
below = 0.3
"""


def _instruments() -> str:
    return "".join(
        f'[[instruments]]\nsymbol = "{s}"\nname = "Instrument {s}"\n'
        f'group = "{"north" if k < 6 else "south"}"\n\n'
        for k, s in enumerate(SYMBOLS))


def _panel(seed: int = 7) -> pd.DataFrame:
    """Fat-tailed returns (Student t, 4 dof) on two factors whose loadings change mid-way,
    with missing closes scattered over every instrument and a two-week hole in one."""
    rng = np.random.default_rng(seed)
    factor = rng.standard_t(4, size=(DAYS, 2)) * 0.01
    loading = np.where(np.arange(len(SYMBOLS)) < 6, 0.8, 0.5)
    returns = np.empty((DAYS, len(SYMBOLS)))
    for k in range(len(SYMBOLS)):
        beta = np.where(np.arange(DAYS) < DAYS // 2, loading[k], loading[k] * ((-1) ** k) * 0.6)
        returns[:, k] = beta * factor[:, k % 2] + rng.standard_t(4, size=DAYS) * 0.008
    closes = 100 * np.exp(np.cumsum(returns, axis=0))
    closes[rng.random(closes.shape) < 0.03] = np.nan
    closes[100:110, 3] = np.nan
    index = pd.bdate_range("2023-01-02", periods=DAYS, name="date")
    return pd.DataFrame(closes, index=index, columns=SYMBOLS)


@pytest.fixture(scope="module")
def closes_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("closes") / "closes.csv"
    _panel().to_csv(path, date_format="%Y-%m-%d")
    return path


@pytest.fixture(scope="module")
def cluster() -> Iterator[distributed.LocalCluster]:
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as running:
        yield running


Desk = Callable[[str], tuple[Store, Settings]]


@pytest.fixture
def desk(tmp_path: Path, write_settings: Callable[..., Settings],
         closes_csv: Path) -> Iterator[Desk]:
    stores: list[Store] = []

    def make(compute: str) -> tuple[Store, Settings]:
        url = f"sqlite:///{tmp_path / f'store{len(stores)}.db'}"
        settings = write_settings(url, _instruments() + RULES, compute)
        store = init_store(settings)
        ingest_file(store, settings, closes_csv, today=dt.date(2024, 6, 3))
        stores.append(store)
        return store, settings

    yield make
    for store in stores:
        store.dispose()


def _history(store: Store) -> tuple[list[tuple[object, ...]], list[tuple[object, ...]]]:
    with store.connect() as conn:
        alerts = alerts_store.list_alerts(conn)
        events = alerts_store.events_for(conn)
    by_id = {a.id: (a.rule, a.target, a.opened_on) for a in alerts}

    def rounded(row: tuple[object, ...]) -> tuple[object, ...]:
        # equal to 1e-12 is the contract (the tiles' measures come from the same kernels
        # over a subset of the pairs); compared at 11 decimals
        return tuple(round(v, 11) if isinstance(v, float) else v for v in row)

    alert_rows = sorted(rounded((a.rule, a.target, a.opened_on, a.state, a.cleared_on,
                                 a.peak_value, a.peak_on, a.last_value)) for a in alerts)
    event_rows = sorted(rounded((*by_id[e["alert_id"]], e["date"], e["event"], e["value"],
                                 e["level"], e["low"], e["high"], e["n"], e["z"],
                                 e["reference"], e["days_held"], e["announce"]))
                        for e in events)
    return alert_rows, event_rows


def _compute(address: str, tile_size: int = 4) -> str:
    return (f'[compute]\nengine = "dask"\nscheduler = "{address}"\nworkers = 2\n'
            f"tile_size = {tile_size}\nconnect_seconds = 2\n")


def test_rules_of_the_panel_are_cut_into_tiles_and_kept_local(desk: Desk) -> None:
    _, settings = desk("")
    plan = build_plan(settings, SYMBOLS)
    assert [rule.name for rule in plan.rules if tileable(rule)] == [
        "low-corr", "high-corr-band", "fast-move", "flip", "moved"]
    assert [rule.name for rule in plan.rules if not tileable(rule)] == ["north-average"]


@pytest.mark.slow
def test_dask_backfill_equals_the_local_one(desk: Desk, cluster: distributed.LocalCluster,
                                            caplog: pytest.LogCaptureFixture) -> None:
    local_store, local_settings = desk("")
    evaluate_range(local_store, local_settings, None, None)
    expected = _history(local_store)
    kinds = {row[0] for row in expected[0]}
    # every rule kind of the panel alerts at least once, so each is compared on real alerts
    assert kinds == {"low-corr", "high-corr-band", "fast-move", "flip", "moved",
                     "north-average"}, kinds
    assert any(row[3] == "cleared" for row in expected[0])

    dask_store, dask_settings = desk(_compute(cluster.scheduler_address))
    with caplog.at_level("INFO", logger="comove"):
        evaluate_range(dask_store, dask_settings, None, None)
    assert _history(dask_store) == expected
    assert "tiles 6/6" in caplog.text


@pytest.mark.slow
def test_resumed_dask_backfill_equals_the_local_one(desk: Desk,
                                                    cluster: distributed.LocalCluster) -> None:
    """Resuming from a saved alert book: the open alerts and streaks it holds are sent to
    the tiles, so their clearing and streaks go on exactly as in one pass."""
    local_store, local_settings = desk("")
    evaluate_range(local_store, local_settings, None, None)
    dask_store, dask_settings = desk(_compute(cluster.scheduler_address, tile_size=5))
    middle = dt.date(2023, 9, 15)
    first = evaluate_range(dask_store, dask_settings, None, middle)
    with dask_store.connect() as conn:
        open_then = [a for a in alerts_store.list_alerts(conn) if a.state == "open"]
    assert open_then, "the resume must start with open alerts to exercise them"
    second = evaluate_range(dask_store, dask_settings, None, None)
    assert second.resumed_from == first.end
    assert _history(dask_store) == _history(local_store)


@pytest.mark.slow
def test_local_scheduler_starts_its_own_cluster(desk: Desk,
                                                caplog: pytest.LogCaptureFixture) -> None:
    local_store, local_settings = desk("")
    evaluate_range(local_store, local_settings, None, dt.date(2023, 8, 1))
    dask_store, dask_settings = desk(_compute("local", tile_size=6))
    with caplog.at_level("INFO", logger="comove"):
        evaluate_range(dask_store, dask_settings, None, dt.date(2023, 8, 1))
    assert _history(dask_store) == _history(local_store)
    # the log names the cluster it started: its two workers and the dashboard's address
    line = next(r.getMessage() for r in caplog.records if r.name == "comove.compute"
                and r.getMessage().startswith("dask scheduler tcp://"))
    assert ", 2 workers, dashboard http://" in line, line


@pytest.mark.slow
def test_a_worker_killed_mid_run_gives_the_same_alerts(
        desk: Desk, monkeypatch: pytest.MonkeyPatch) -> None:
    """The first tile back kills the other worker's process (SIGKILL): Dask reruns its
    tiles on the worker left and on the one the nanny starts again."""
    import os
    import signal

    from monitor.pipeline import evaluate as evaluate_module

    local_store, local_settings = desk("")
    evaluate_range(local_store, local_settings, None, None)
    killed: list[int] = []
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as running:
        pids = [nanny.pid for nanny in running.workers.values()]
        real = evaluate_module._tile_progress()

        def progress(done: int, total: int) -> None:
            if not killed:
                os.kill(pids[-1], signal.SIGKILL)
                killed.append(pids[-1])
            real(done, total)

        monkeypatch.setattr(evaluate_module, "_tile_progress", lambda: progress)
        dask_store, dask_settings = desk(_compute(running.scheduler_address, tile_size=3))
        evaluate_range(dask_store, dask_settings, None, None)
    assert killed
    assert _history(dask_store) == _history(local_store)


def test_unreachable_scheduler_is_one_line_and_writes_nothing(desk: Desk) -> None:
    store, settings = desk(_compute("tcp://127.0.0.1:9"))
    with pytest.raises(ComoveError) as caught:
        evaluate_range(store, settings, None, None)
    message = str(caught.value)
    assert "tcp://127.0.0.1:9" in message and "\n" not in message
    with store.connect() as conn:
        assert alerts_store.list_alerts(conn) == []
        assert runs_store.list_runs(conn, kind="backfill") == []
