"""An extreme close with simple returns, end to end: accepted (within the ingest limits) as
a suspect tick, it must not wipe out what was computed before it. The alerts and the
correlations before the tick are those of the same history without it, and the alerts
opened before it keep their states."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.demo.synthetic import generate
from monitor.pipeline import backfill, ingest_file, init_store, series
from storage import alerts as alerts_store
from tests.scenarios import INSTRUMENTS, RULES, break_scenario

TICK = pd.Timestamp("2023-09-01")
SIMPLE = '\n[returns]\nkind = "simple"\n'


def _desk(tmp_path: Path, write_settings: Callable[..., Settings], name: str,
          frame: pd.DataFrame) -> tuple[Settings, list[tuple[object, ...]], pd.DataFrame]:
    folder = tmp_path / name
    folder.mkdir()
    settings = write_settings(f"sqlite:///{folder / 'store.sqlite'}",
                              INSTRUMENTS + RULES + SIMPLE)
    store = init_store(settings)
    path = folder / "history.csv"
    frame.to_csv(path, date_format="%Y-%m-%d")
    report = ingest_file(store, settings, path)
    backfill(store, settings, None, None)
    with store.connect() as conn:
        alerts = sorted((a.rule, a.target, a.opened_on, a.state, a.cleared_on, a.peak_value)
                        for a in alerts_store.list_alerts(conn))
    values = series(store, settings, "KLV", "DUNQ", "rolling:21")
    store.dispose()
    assert name != "tick" or not report.suspects.empty  # flagged, and accepted
    return settings, alerts, values


def test_one_extreme_close_leaves_everything_before_it_as_it_was(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    clean = generate(break_scenario()).closes
    clean.index.name = "date"
    ticked = clean.copy()
    ticked.loc[TICK, "KLV"] *= 5000.0  # a misplaced decimal point, back the next day
    _, base_alerts, base_values = _desk(tmp_path, write_settings, "clean", clean)
    _, tick_alerts, tick_values = _desk(tmp_path, write_settings, "tick", ticked)

    before = TICK.date()
    base_early = [a for a in base_alerts if a[2] < before]
    assert base_early, "the scenario's planted break opens alerts before the tick"
    tick_early = [a for a in tick_alerts if a[2] < before]
    # Same alerts, same states where they cleared before the tick.
    assert [a[:3] for a in tick_early] == [a[:3] for a in base_early]
    for ours, theirs in zip(tick_early, base_early, strict=True):
        if theirs[4] is not None and theirs[4] < before:
            assert ours[3:5] == theirs[3:5]
            assert ours[5] == pytest.approx(theirs[5], rel=1e-9, abs=1e-12)
    # The correlations before the tick are finite and unchanged (no blank stretch).
    early = [d < before for d in base_values["date"]]
    ours = tick_values.loc[early, "value"].to_numpy(dtype=np.float64)
    theirs = base_values.loc[early, "value"].to_numpy(dtype=np.float64)
    assert np.isfinite(theirs[21:]).all()
    np.testing.assert_allclose(ours, theirs, rtol=0, atol=1e-9, equal_nan=True)
    # And after the tick's window has passed the values are finite again.
    late = [d > before + dt.timedelta(days=45) for d in tick_values["date"]]
    assert np.isfinite(tick_values.loc[late, "value"].to_numpy(dtype=np.float64)).all()
