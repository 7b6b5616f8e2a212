"""A symbol may hold '/' (a currency pair such as EUR/USD): it can be paired in a rule,
muted and looked up as a pair, and its pair page is drawn; an ambiguous pair is refused
with both readings."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.config import Settings
from monitor.errors import ConfigError
from monitor.pipeline import (
    backfill,
    build_pages,
    canonical_pair,
    ingest_file,
    init_store,
    list_alerts,
    mute,
    universe,
)
from monitor.rules import pair_symbols, split_pair

DESK = """
[desk]
name = "Halden FX Desk"
timezone = "Europe/Berlin"

[[instruments]]
symbol = "EUR/USD"
name = "Euro in dollars"
group = "fx"

[[instruments]]
symbol = "KLV"
name = "Kelvara Industrial"
group = "equities"

[[rules]]
name = "fx-hedge"
kind = "level"
measure = "rolling:21"
pairs = ["KLV/EUR/USD"]
above = 0.5
hold = 1
"""


def test_split_pair_tries_every_slash() -> None:
    known = {"EUR/USD": 0, "KLV": 1, "A": 2, "A/B": 3, "B/C": 4, "C": 5}
    assert split_pair("EUR/USD/KLV", known) == [("EUR/USD", "KLV")]
    assert split_pair("KLV / EUR/USD", known) == [("KLV", "EUR/USD")]
    assert split_pair("A/B/C", known) == [("A", "B/C"), ("A/B", "C")]
    assert split_pair("KLV/NOPE", known) == []
    assert pair_symbols("EUR/USD", known) is None  # a symbol, not a pair
    assert pair_symbols("EUR/USD/KLV", known) == ("EUR/USD", "KLV")


def test_a_symbol_with_a_slash_is_paired_muted_and_paged(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    settings = write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", DESK)
    store = init_store(settings)
    dates = pd.bdate_range("2025-01-02", periods=80)
    rng = np.random.default_rng(4)
    common = rng.normal(0, 0.01, len(dates))
    frame = pd.DataFrame({
        "EUR/USD": 1.1 * np.exp(np.cumsum(common + rng.normal(0, 0.002, len(dates)))),
        "KLV": 50 * np.exp(np.cumsum(common + rng.normal(0, 0.002, len(dates)))),
    }, index=dates)
    path = tmp_path / "closes.csv"
    path.write_text("date,symbol,close\n" + "".join(
        f"{day:%Y-%m-%d},{symbol},{float(frame.loc[day, symbol])!r}\n"
        for day in dates for symbol in frame.columns))
    ingest_file(store, settings, path)
    backfill(store, settings, None, None)
    symbols = universe(store, settings)
    assert canonical_pair(settings, symbols, "KLV/EUR/USD") == "EUR/USD/KLV"
    alerts = list_alerts(store, settings, open_only=False, pair="KLV/EUR/USD")
    assert len(alerts) >= 1 and set(alerts["target"]) == {"EUR/USD/KLV"}
    mute_id = mute(store, settings, rule=None, pair="KLV/EUR/USD",
                   until=dt.date(2099, 1, 1), reason="hedge being rebuilt")
    assert mute_id > 0
    pages = tmp_path / "pages"
    build_pages(store, settings, pages)
    pair_pages = [p for p in (pages / "pairs").glob("*.html")]
    assert len(pair_pages) == 1
    html = pair_pages[0].read_text(encoding="utf-8")
    assert "Euro in dollars" in html and "Kelvara Industrial" in html
    store.dispose()


def test_an_ambiguous_pair_names_both_readings(
    tmp_path: Path, write_settings: Callable[..., Settings]
) -> None:
    body = DESK.replace('pairs = ["KLV/EUR/USD"]', 'pairs = ["EUR/USD/KLV"]') + """
[[instruments]]
symbol = "EUR"
group = "fx"

[[instruments]]
symbol = "USD/KLV"
group = "fx"
"""
    with pytest.raises(ConfigError, match=r"'EUR/USD/KLV' is ambiguous: 'EUR' with 'USD/KLV' "
                                          r"or 'EUR/USD' with 'KLV'"):
        write_settings(f"sqlite:///{tmp_path / 'store.sqlite'}", body)
