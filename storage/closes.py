"""Instruments, closes, restatements, suspect ticks and ingest batches.

Every function that writes takes a Connection from `Store.begin()`, so a caller can put a
whole file's worth of changes into one transaction: all of it lands, or none of it.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from sqlalchemy import (
    ColumnElement,
    Connection,
    and_,
    bindparam,
    func,
    select,
    update,
)

from storage.schema import (
    close_revisions,
    closes,
    ingest_batches,
    instruments,
    suspect_ticks,
)


@dataclass(frozen=True)
class InstrumentRow:
    symbol: str
    name: str = ""
    group: str = ""
    currency: str = ""
    calendar: str = ""


def sync_instruments(conn: Connection, items: Iterable[InstrumentRow]) -> None:
    """Insert or update the listed instruments (symbols never disappear: closes refer to them)."""
    existing = {row.symbol: row for row in conn.execute(select(instruments)).all()}
    for item in items:
        values = {"name": item.name, "group_name": item.group, "currency": item.currency,
                  "calendar": item.calendar}
        old = existing.get(item.symbol)
        if old is None:
            conn.execute(instruments.insert().values(symbol=item.symbol, **values))
        elif (old.name, old.group_name, old.currency, old.calendar) != tuple(values.values()):
            conn.execute(
                instruments.update().where(instruments.c.symbol == item.symbol).values(**values)
            )


def ensure_symbols(conn: Connection, symbols: Iterable[str]) -> None:
    """Add bare instrument rows for symbols the store does not know yet."""
    known = set(conn.execute(select(instruments.c.symbol)).scalars())
    missing = sorted(set(symbols) - known)
    if missing:
        conn.execute(instruments.insert(), [{"symbol": s, "name": "", "group_name": "",
                                             "currency": "", "calendar": ""} for s in missing])


def list_instruments(conn: Connection) -> list[InstrumentRow]:
    rows = conn.execute(select(instruments).order_by(instruments.c.symbol)).all()
    return [InstrumentRow(r.symbol, r.name, r.group_name, r.currency, r.calendar) for r in rows]


def batch_for_sha(conn: Connection, sha256: str) -> int | None:
    """The id of an accepted batch with these exact bytes, if any."""
    return conn.execute(
        select(ingest_batches.c.id)
        .where(ingest_batches.c.sha256 == sha256, ingest_batches.c.status != "rejected")
        .order_by(ingest_batches.c.id)
        .limit(1)
    ).scalar()


def read_closes_long(
    conn: Connection,
    symbols: Sequence[str] | None = None,
    start: dt.date | None = None,
    end: dt.date | None = None,
) -> pd.DataFrame:
    """Closes as a long frame (symbol, date as datetime64, close), sorted by symbol and date."""
    wanted = None if symbols is None else set(symbols)
    if wanted is not None and not wanted:
        rows: list[tuple[object, ...]] = []
    elif conn.dialect.name == "sqlite":
        rows = _fetch_sqlite(conn, wanted, start, end)
    else:
        query = select(closes.c.symbol, closes.c.date, closes.c.close)
        conditions: list[ColumnElement[bool]] = []
        if wanted is not None and len(wanted) <= 500:
            conditions.append(closes.c.symbol.in_(sorted(wanted)))
        if start is not None:
            conditions.append(closes.c.date >= start)
        if end is not None:
            conditions.append(closes.c.date <= end)
        if conditions:
            query = query.where(and_(*conditions))
        rows = [tuple(r) for r in conn.execute(query)]
    # Plain tuples into from_records and dates parsed in one vectorised call: per-row
    # objects would dominate the time of reading a ten-year panel.
    frame = pd.DataFrame.from_records(rows, columns=["symbol", "date", "close"],
                                      coerce_float=True)
    dates = frame["date"]
    if not pd.api.types.is_string_dtype(dates) or conn.dialect.name != "sqlite":
        dates = dates.astype(str).str.slice(0, 10)
    frame["date"] = pd.to_datetime(dates, format="%Y-%m-%d")
    frame["close"] = frame["close"].astype("float64")
    if wanted is not None and len(wanted) > 500:
        frame = frame.loc[frame["symbol"].isin(wanted)]
    if not frame.empty:
        frame = frame.sort_values(["symbol", "date"], kind="stable").reset_index(drop=True)
    return frame


def _fetch_sqlite(conn: Connection, wanted: set[str] | None, start: dt.date | None,
                  end: dt.date | None) -> list[tuple[object, ...]]:
    # The driver's own cursor: SQLite keeps dates as ISO text, so nothing needs converting
    # per row, and SQLAlchemy's result rows would cost more than the query itself.
    sql = "SELECT symbol, date, close FROM closes"
    clauses: list[str] = []
    params: list[object] = []
    if wanted is not None and len(wanted) <= 500:
        clauses.append("symbol IN (" + ",".join("?" * len(wanted)) + ")")
        params.extend(sorted(wanted))
    if start is not None:
        clauses.append("date >= ?")
        params.append(start.isoformat())
    if end is not None:
        clauses.append("date <= ?")
        params.append(end.isoformat())
    if clauses:
        sql += " WHERE " + " AND ".join(clauses)
    cursor = conn.connection.cursor()
    try:
        cursor.execute(sql, params)
        return list(cursor.fetchall())
    finally:
        cursor.close()


def read_panel(
    conn: Connection,
    symbols: Sequence[str] | None = None,
    start: dt.date | None = None,
    end: dt.date | None = None,
) -> pd.DataFrame:
    """Closes as a panel: DatetimeIndex `date` (every date any listed symbol has a close)
    x one column per symbol, NaN where a symbol has no close that day."""
    long = read_closes_long(conn, symbols, start, end)
    panel = long.pivot(index="date", columns="symbol", values="close")
    panel.columns.name = None
    if symbols is not None:
        panel = panel.reindex(columns=list(symbols))
    return panel.sort_index()


@dataclass(frozen=True)
class BatchWrite:
    """What one file changed in the store."""

    batch_id: int
    closes_new: int
    closes_restated: int
    closes_unchanged: int
    earliest_restated: dt.date | None
    restatements: pd.DataFrame  # symbol, date, old_close, new_close
    suspects: pd.DataFrame  # symbol, date, close, previous_close, log_return


def insert_batch(
    conn: Connection,
    *,
    file_name: str,
    sha256: str,
    rows_read: int,
    rows_accepted: int,
    rows_rejected: int,
    status: str,
    problems: Sequence[str],
    now: dt.datetime,
) -> int:
    result = conn.execute(
        ingest_batches.insert().values(
            file_name=file_name, sha256=sha256, rows_read=rows_read,
            rows_accepted=rows_accepted, rows_rejected=rows_rejected, closes_new=0,
            closes_restated=0, status=status, problems="\n".join(problems), ingested_at=now,
        )
    )
    key = result.inserted_primary_key
    assert key is not None
    return int(key[0])


def diff_closes(existing: pd.DataFrame, new: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Split `new` (symbol, date, close, source) into closes not stored yet and restatements
    (a different close for a stored date: symbol, date, old_close, new_close, source)."""
    merged = new.merge(existing[["symbol", "date", "close"]].rename(columns={"close": "old"}),
                       on=["symbol", "date"], how="left")
    is_new = merged["old"].isna().to_numpy()
    changed = ~is_new & (merged["close"].to_numpy() != merged["old"].to_numpy())
    fresh = merged.loc[is_new, ["symbol", "date", "close", "source"]]
    restated = merged.loc[changed, ["symbol", "date", "old", "close", "source"]].rename(
        columns={"old": "old_close", "close": "new_close"}
    )
    return fresh.reset_index(drop=True), restated.reset_index(drop=True)


def _dates(values: pd.Series) -> list[dt.date]:
    return [ts.date() for ts in pd.to_datetime(values)]


def write_closes(
    conn: Connection,
    batch_id: int,
    file_name: str,
    fresh: pd.DataFrame,
    restated: pd.DataFrame,
    suspects: pd.DataFrame,
    now: dt.datetime,
) -> None:
    """Insert new closes, apply restatements with their audit rows, record suspect ticks."""
    if not fresh.empty:
        _bulk_insert_closes(conn, batch_id, fresh)
    if not restated.empty:
        params = [
            {"b_symbol": s, "b_date": d, "b_close": float(new), "b_source": src,
             "b_batch": batch_id}
            for s, d, new, src in zip(
                restated["symbol"].tolist(), _dates(restated["date"]),
                restated["new_close"].tolist(), restated["source"].tolist(), strict=True,
            )
        ]
        conn.execute(
            update(closes)
            .where(closes.c.symbol == bindparam("b_symbol"), closes.c.date == bindparam("b_date"))
            .values(close=bindparam("b_close"), source=bindparam("b_source"),
                    batch_id=bindparam("b_batch")),
            params,
        )
        write_revisions(conn, batch_id, file_name, restated, now)
    if not suspects.empty:
        seen = {
            (r.symbol, r.date, r.close)
            for r in conn.execute(select(suspect_ticks.c.symbol, suspect_ticks.c.date,
                                         suspect_ticks.c.close))
        }
        rows = [
            {"symbol": s, "date": d, "close": float(c), "previous_close": float(p),
             "log_return": float(lr), "batch_id": batch_id}
            for s, d, c, p, lr in zip(
                suspects["symbol"].tolist(), _dates(suspects["date"]),
                suspects["close"].tolist(), suspects["previous_close"].tolist(),
                suspects["log_return"].tolist(), strict=True,
            )
            if (s, d, float(c)) not in seen
        ]
        if rows:
            conn.execute(suspect_ticks.insert(), rows)


def _bulk_insert_closes(conn: Connection, batch_id: int, fresh: pd.DataFrame) -> None:
    # Sorted by the primary key so the B-tree only ever appends.
    fresh = fresh.sort_values(["symbol", "date"], kind="stable")
    symbols = fresh["symbol"].tolist()
    values = fresh["close"].to_numpy(np.float64).tolist()
    sources = fresh["source"].tolist()
    if conn.dialect.name == "sqlite":
        # Straight to the driver: SQLAlchemy's per-row parameter processing costs more
        # than SQLite's own insert for a ten-year file. The text form is what the Date
        # type itself stores on SQLite.
        days = pd.to_datetime(fresh["date"]).dt.strftime("%Y-%m-%d").tolist()
        conn.exec_driver_sql(
            "INSERT INTO closes (symbol, date, close, source, batch_id) VALUES (?, ?, ?, ?, ?)",
            [(s, d, c, src, batch_id)
             for s, d, c, src in zip(symbols, days, values, sources, strict=True)],
        )
        return
    conn.execute(
        closes.insert(),
        [{"symbol": s, "date": d, "close": c, "source": src, "batch_id": batch_id}
         for s, d, c, src in zip(symbols, _dates(fresh["date"]), values, sources, strict=True)],
    )


def write_revisions(conn: Connection, batch_id: int, file_name: str, restated: pd.DataFrame,
                    now: dt.datetime) -> None:
    conn.execute(
        close_revisions.insert(),
        [
            {"symbol": s, "date": d, "old_close": float(o), "new_close": float(n),
             "source_file": file_name, "batch_id": batch_id, "revised_at": now}
            for s, d, o, n in zip(
                restated["symbol"].tolist(), _dates(restated["date"]),
                restated["old_close"].tolist(), restated["new_close"].tolist(), strict=True,
            )
        ],
    )


def finish_batch(conn: Connection, batch_id: int, *, closes_new: int, closes_restated: int,
                 earliest_restated: dt.date | None, earliest_changed: dt.date | None) -> None:
    conn.execute(
        ingest_batches.update()
        .where(ingest_batches.c.id == batch_id)
        .values(closes_new=closes_new, closes_restated=closes_restated,
                earliest_restated=earliest_restated, earliest_changed=earliest_changed)
    )


def earliest_change_since(conn: Connection, batch_id: int) -> tuple[dt.date | None, int]:
    """The first close date changed by any batch after `batch_id`, and the newest batch id."""
    newest = conn.execute(select(func.max(ingest_batches.c.id))).scalar() or 0
    first = conn.execute(
        select(func.min(ingest_batches.c.earliest_changed)).where(ingest_batches.c.id > batch_id)
    ).scalar()
    return first, int(newest)


def first_changing_batch(conn: Connection, after_batch: int, on_or_before: dt.date
                         ) -> tuple[int, str] | None:
    """The first batch after `after_batch` that changed a close on or before the given day
    (a restatement or history ingested late): its id and file name; None when there is
    none."""
    row = conn.execute(
        select(ingest_batches.c.id, ingest_batches.c.file_name)
        .where(ingest_batches.c.id > after_batch,
               ingest_batches.c.earliest_changed <= on_or_before)
        .order_by(ingest_batches.c.id).limit(1)
    ).first()
    return (int(row.id), str(row.file_name)) if row is not None else None


@dataclass(frozen=True)
class BatchRow:
    id: int
    file_name: str
    sha256: str
    rows_read: int
    rows_accepted: int
    rows_rejected: int
    closes_new: int
    closes_restated: int
    earliest_restated: dt.date | None
    earliest_changed: dt.date | None
    status: str
    problems: str
    ingested_at: dt.datetime


def list_batches(conn: Connection) -> list[BatchRow]:
    rows = conn.execute(select(ingest_batches).order_by(ingest_batches.c.id)).all()
    return [BatchRow(**row._mapping) for row in rows]


def last_close_date(conn: Connection, on_or_before: dt.date | None = None) -> dt.date | None:
    query = select(func.max(closes.c.date))
    if on_or_before is not None:
        query = query.where(closes.c.date <= on_or_before)
    return conn.execute(query).scalar()


def count_closes(conn: Connection) -> int:
    return int(conn.execute(select(func.count()).select_from(closes)).scalar() or 0)


def list_revisions(conn: Connection, since: dt.date | None = None) -> pd.DataFrame:
    query = select(close_revisions).order_by(close_revisions.c.id)
    if since is not None:
        query = query.where(close_revisions.c.date >= since)
    return pd.DataFrame(conn.execute(query).all(), columns=list(close_revisions.c.keys()))


def list_suspects(conn: Connection) -> pd.DataFrame:
    query = select(suspect_ticks).order_by(suspect_ticks.c.date, suspect_ticks.c.symbol)
    return pd.DataFrame(conn.execute(query).all(), columns=list(suspect_ticks.c.keys()))
