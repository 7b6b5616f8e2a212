"""Opening the store from the settings, and reading closes and returns from it."""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from monitor.calendar import Schedule, parse_schedule
from monitor.config import Settings
from monitor.data.returns import closes_to_returns
from monitor.errors import ComoveError
from storage import Store, open_store
from storage import closes as closes_store


def desk_today(settings: Settings, now: dt.datetime | None = None) -> dt.date:
    """Today's date in the desk's time zone."""
    moment = now or dt.datetime.now(dt.UTC)
    return moment.astimezone(ZoneInfo(settings.desk.timezone)).date()


def open_settings_store(settings: Settings, *, create: bool = False) -> Store:
    store = open_store(settings.store_url, create=create,
                       busy_timeout=float(settings.store.busy_timeout))
    if create:
        with store.begin() as conn:
            closes_store.sync_instruments(conn, instrument_rows(settings))
    return store


def instrument_rows(settings: Settings) -> list[closes_store.InstrumentRow]:
    return [
        closes_store.InstrumentRow(i.symbol, i.name, i.group, i.currency, i.calendar)
        for i in settings.instruments
    ]


def init_store(settings: Settings) -> Store:
    """Create the store's tables (idempotent), record the configured instruments, make the inbox."""
    store = open_settings_store(settings, create=True)
    settings.inbox.mkdir(parents=True, exist_ok=True)
    return store


def read_closes(store: Store, symbols: Sequence[str] | None = None,
                start: dt.date | None = None, end: dt.date | None = None) -> pd.DataFrame:
    """The closes panel (dates x symbols) from the store."""
    with store.connect() as conn:
        return closes_store.read_panel(conn, symbols, start, end)


def read_returns(store: Store, settings: Settings, symbols: Sequence[str] | None = None,
                 start: dt.date | None = None, end: dt.date | None = None) -> pd.DataFrame:
    """Aligned returns from the store, as the settings' [returns] section defines them."""
    panel = read_closes(store, symbols, start, end)
    r = settings.returns
    return closes_to_returns(panel, kind=r.kind, horizon=r.horizon,
                             fill_limit=r.fill_limit,
                                max_gap=r.max_gap)


def instrument_summary(store: Store) -> pd.DataFrame:
    """One row per instrument: name, group, first and last date, number of closes, gaps.

    A gap is a date inside the instrument's first..last span on which some other
    instrument has a close and this one has none.
    """
    with store.connect() as conn:
        listed = closes_store.list_instruments(conn)
        panel = closes_store.read_panel(conn)
    rows = []
    dates = panel.index
    for inst in listed:
        if inst.symbol in panel.columns:
            has = panel[inst.symbol].notna().to_numpy()
            where = np.flatnonzero(has)
        else:
            where = np.zeros(0, dtype=np.int64)
        if where.size:
            first, last = int(where[0]), int(where[-1])
            count = int(where.size)
            gaps = (last - first + 1) - count
            rows.append((inst.symbol, inst.name, inst.group, dates[first].date(),
                         dates[last].date(), count, gaps))
        else:
            rows.append((inst.symbol, inst.name, inst.group, None, None, 0, 0))
    return pd.DataFrame(rows, columns=["symbol", "name", "group", "first", "last", "closes",
                                       "gaps"])


def universe(store: Store, settings: Settings) -> list[str]:
    """The instruments evaluated: the configured ones, else every symbol in the store."""
    if settings.instruments:
        return settings.symbols
    with store.connect() as conn:
        return [row.symbol for row in closes_store.list_instruments(conn)]


FEED_RULE = "data-feed"
"""Built-in data-quality alert: a scheduled run date with no new closes at run time."""


def latest_close_date(store: Store) -> dt.date:
    with store.connect() as conn:
        last = closes_store.last_close_date(conn)
    if last is None:
        raise ComoveError("the store has no closes yet: comove ingest FILE first")
    return last


def schedule_of(settings: Settings) -> Schedule:
    """The `[schedule]` settings, read and checked."""
    return parse_schedule(settings.section("schedule"), desk_timezone=settings.desk.timezone,
                          base_dir=settings.base_dir)


def pages_folder(settings: Settings) -> Path:
    return settings.resolve_path("pages")
