"""Windows longer than the desk allows, or than the stored history, are settings errors that
say so in one line, instead of a process killed for memory or a rule that never shows."""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Callable
from pathlib import Path

import pytest

from monitor.config import Settings
from monitor.errors import ConfigError
from monitor.pipeline import evaluate_range, ingest_file, init_store
from tests.conftest import DESK_TOML

LEVEL_RULE = """
[[rules]]
name = "klv-orma-low"
kind = "level"
pairs = ["KLV/ORMA"]
below = 0.2
measure = "{measure}"
"""


def test_a_rule_window_above_the_maximum_is_refused_at_load(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    with pytest.raises(ConfigError) as info:
        write_settings(url, DESK_TOML + LEVEL_RULE.format(measure="rolling:100000000"))
    text = str(info.value) + "\n".join(getattr(info.value, "problems", []))
    assert ("measure rolling:100000000 has a window of 100000000 rows, more than "
            "correlation.max_window (2520)") in text
    assert "klv-orma-low" in text or "rules[0]" in text


@pytest.mark.parametrize(
    ("section", "message"),
    [
        ('[correlation]\nmeasures = ["rolling:63", "rank:3000"]\n',
         "correlation.measures[1]: measure rank:3000 has a window of 3000 rows, more than "
         "correlation.max_window (2520)"),
        ('[correlation]\ndefault_measure = "ewma:hl=5000"\n',
         "correlation.default_measure: measure ewma:hl=5000 has a half-life of 5000 days, "
         "more than correlation.max_window (2520)"),
    ],
)
def test_correlation_measures_above_the_maximum_are_refused(
    tmp_path: Path, write_settings: Callable[..., Settings], section: str, message: str
) -> None:
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    with pytest.raises(ConfigError) as info:
        write_settings(url, DESK_TOML + section)
    text = "\n".join([str(info.value), *getattr(info.value, "problems", [])])
    assert message in text


def test_a_larger_configured_maximum_allows_a_longer_window(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    settings = write_settings(url, DESK_TOML + "[correlation]\nmax_window = 5000\n"
                              + LEVEL_RULE.format(measure="rolling:3000"))
    assert settings.correlation.max_window == 5000


def _desk(store_url: str, write_settings: Callable[..., Settings], tmp_path: Path,
          measure: str) -> tuple[object, Settings]:
    settings = write_settings(store_url, DESK_TOML + LEVEL_RULE.format(measure=measure))
    store = init_store(settings)
    days = [dt.date(2024, 1, 1) + dt.timedelta(days=i) for i in range(60)]
    days = [d for d in days if d.weekday() < 5][:30]
    lines = ["date,KLV,ORMA"] + [f"{d},{100 + i % 7},{50 + (i * 3) % 5}"
                                 for i, d in enumerate(days)]
    path = tmp_path / "hist.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    ingest_file(store, settings, path, today=dt.date(2024, 3, 1))
    return store, settings


def test_a_backfill_with_a_window_longer_than_the_history_is_a_settings_error(
    store_url: str, write_settings: Callable[..., Settings], tmp_path: Path
) -> None:
    store, settings = _desk(store_url, write_settings, tmp_path, "rolling:63")
    with pytest.raises(ConfigError) as info:
        evaluate_range(store, settings, None, None)
    assert str(info.value) == (
        "rule 'klv-orma-low': measure rolling:63 needs 63 returns but the store holds 29 "
        "(from 2024-01-02 to 2024-02-09); shorten the window or ingest more history")
    store.dispose()  # type: ignore[attr-defined]


def test_the_evening_evaluation_warns_instead_and_goes_on(
    store_url: str, write_settings: Callable[..., Settings], tmp_path: Path,
    caplog: pytest.LogCaptureFixture
) -> None:
    store, settings = _desk(store_url, write_settings, tmp_path, "rolling:63")
    comove = logging.getLogger("comove")
    before = comove.propagate
    comove.propagate = True  # the command line's handler stops it; caplog listens at the root
    try:
        with caplog.at_level(logging.WARNING, logger="comove"):
            report = evaluate_range(store, settings, None, None, kind="evaluation")
    finally:
        comove.propagate = before
    assert report.days > 0
    assert any("measure rolling:63 needs 63 returns but the store holds 29" in r.getMessage()
               for r in caplog.records)
    store.dispose()  # type: ignore[attr-defined]


@pytest.mark.parametrize(
    ("section", "message"),
    [
        ('[correlation]\nmeasures = ["rolling:63", "beta:63"]\n',
         "correlation.measures[1]: 'beta:63' is a hedge ratio or R squared, not a correlation"),
        ('[correlation]\ndefault_measure = "r2:hl=21"\n',
         "correlation.default_measure: 'r2:hl=21' is a hedge ratio or R squared, not a "
         "correlation"),
        (LEVEL_RULE.format(measure="beta:63"),
         "'beta:63' is a hedge ratio or R squared, not a correlation: this kind's levels"),
    ],
)
def test_a_hedge_ratio_where_a_correlation_is_read_is_refused(
    tmp_path: Path, write_settings: Callable[..., Settings], section: str, message: str
) -> None:
    """A slope of B on A is not symmetric and has no Fisher z: the pages' matrices, group
    averages, largest changes and the correlation rule kinds cannot read it."""
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    with pytest.raises(ConfigError) as info:
        write_settings(url, DESK_TOML + section)
    text = "\n".join([str(info.value), *getattr(info.value, "problems", [])])
    assert message in text


def test_a_hedge_rule_still_takes_its_beta_measure(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    settings = write_settings(url, DESK_TOML + '\n[[rules]]\nname = "klv-orma-hedge"\n'
                              'kind = "hedge"\npairs = ["KLV/ORMA"]\nmeasure = "beta:42"\n')
    assert [t["kind"] for t in settings.rule_tables] == ["hedge"]
