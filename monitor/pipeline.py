"""The only module that wires the store to the computation.

The CLI and the scheduler call these functions; each opens what it needs from the store,
hands plain frames and arrays to the pure modules and writes the results back.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from monitor.config import Settings
from monitor.errors import IngestError
from monitor.ingest import FileFormat, find_suspects, parse_closes, read_bytes
from monitor.returns import closes_to_returns
from storage import Store, open_store
from storage import closes as closes_store

NEIGHBOUR_DAYS = 31
"""Calendar days either side of a file's dates read back to judge suspect moves."""


def desk_today(settings: Settings, now: dt.datetime | None = None) -> dt.date:
    """Today's date in the desk's time zone."""
    moment = now or dt.datetime.now(dt.UTC)
    return moment.astimezone(ZoneInfo(settings.desk.timezone)).date()


def open_settings_store(settings: Settings, *, create: bool = False) -> Store:
    store = open_store(settings.store_url, create=create)
    if create:
        with store.begin() as conn:
            closes_store.sync_instruments(conn, _instrument_rows(settings))
    return store


def _instrument_rows(settings: Settings) -> list[closes_store.InstrumentRow]:
    return [
        closes_store.InstrumentRow(i.symbol, i.name, i.group, i.currency, i.calendar)
        for i in settings.instruments
    ]


def init_store(settings: Settings) -> Store:
    """Create the store's tables (idempotent), record the configured instruments, make the inbox."""
    store = open_settings_store(settings, create=True)
    settings.inbox.mkdir(parents=True, exist_ok=True)
    return store


@dataclass
class IngestReport:
    """What ingesting one file did."""

    file: str
    rows_read: int
    rows_accepted: int
    rows_rejected: int
    batch_id: int | None = None
    closes_new: int = 0
    closes_restated: int = 0
    closes_unchanged: int = 0
    earliest_restated: dt.date | None = None
    already_ingested: bool = False
    restatements: pd.DataFrame = field(default_factory=pd.DataFrame)
    suspects: pd.DataFrame = field(default_factory=pd.DataFrame)
    problems: list[str] = field(default_factory=list)


def ingest_file(
    store: Store,
    settings: Settings,
    path: Path,
    *,
    layout: FileFormat = "auto",
    skip_bad: bool = False,
    today: dt.date | None = None,
    now: dt.datetime | None = None,
) -> IngestReport:
    """Validate one closes file and write it in one transaction.

    All-or-nothing by default: with any bad row nothing is written and IngestError lists
    every problem (a rejected batch is still recorded for the audit trail). With
    `skip_bad` the good rows are written and the rejects recorded in the batch.
    """
    now = now or dt.datetime.now(dt.UTC)
    today = today or desk_today(settings, now)
    strict = bool(settings.instruments) and not settings.sources.allow_new_symbols
    parsed = parse_closes(
        path.name, read_bytes(path), today=today,
        known_symbols=settings.symbols if strict else None, layout=layout,
        today_zone=settings.desk.timezone,
    )
    accepted = len(parsed.rows)
    if parsed.problems and not skip_bad:
        with store.begin() as conn:
            closes_store.insert_batch(
                conn, file_name=str(path), sha256=parsed.sha256, rows_read=parsed.rows_read,
                rows_accepted=0, rows_rejected=parsed.rows_rejected, status="rejected",
                problems=parsed.problems, now=now,
            )
        raise IngestError(
            f"{path.name}: {len(parsed.problems)} bad value(s) on {parsed.rows_rejected} "
            "line(s); nothing from the file was written (--skip-bad writes the good rows)",
            parsed.problems,
        )
    report = IngestReport(file=str(path), rows_read=parsed.rows_read, rows_accepted=accepted,
                          rows_rejected=parsed.rows_rejected, problems=parsed.problems)
    rows = parsed.rows
    with store.begin() as conn:
        previous = closes_store.batch_for_sha(conn, parsed.sha256)
        if previous is not None and not parsed.problems:
            report.already_ingested = True
            report.batch_id = previous
            report.closes_unchanged = accepted
            return report
        closes_store.sync_instruments(conn, _instrument_rows(settings))
        closes_store.ensure_symbols(conn, rows["symbol"].unique().tolist())
        if rows.empty:
            existing = rows[["symbol", "date", "close"]]
        else:
            margin = dt.timedelta(days=NEIGHBOUR_DAYS)
            existing = closes_store.read_closes_long(
                conn, sorted(rows["symbol"].unique().tolist()),
                rows["date"].min().date() - margin, rows["date"].max().date() + margin,
            )
        fresh, restated = closes_store.diff_closes(existing, rows)
        suspects = find_suspects(existing, rows, settings.returns.suspect_move)
        batch_id = closes_store.insert_batch(
            conn, file_name=str(path), sha256=parsed.sha256, rows_read=parsed.rows_read,
            rows_accepted=accepted, rows_rejected=parsed.rows_rejected,
            status="partial" if parsed.problems else "accepted", problems=parsed.problems,
            now=now,
        )
        closes_store.write_closes(conn, batch_id, str(path), fresh, restated, suspects, now)
        earliest = restated["date"].min().date() if not restated.empty else None
        changed = pd.concat([fresh["date"], restated["date"]])
        closes_store.finish_batch(
            conn, batch_id, closes_new=len(fresh), closes_restated=len(restated),
            earliest_restated=earliest,
            earliest_changed=changed.min().date() if len(changed) else None,
        )
    report.batch_id = batch_id
    report.closes_new = len(fresh)
    report.closes_restated = len(restated)
    report.closes_unchanged = accepted - len(fresh) - len(restated)
    report.earliest_restated = earliest
    report.restatements = restated
    report.suspects = suspects
    return report


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
    return closes_to_returns(panel, kind=r.kind, horizon=r.horizon,  # type: ignore[arg-type]
                             fill_limit=r.fill_limit)


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
