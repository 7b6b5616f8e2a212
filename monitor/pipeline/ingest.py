"""One closes file into the store: parse, validate, detect suspect ticks, write in one
transaction.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from monitor.config import Settings
from monitor.data.parse import FileFormat, parse_closes, read_bytes
from monitor.data.quality import find_suspects
from monitor.errors import IngestError
from monitor.pipeline.store import desk_today, instrument_rows
from storage import Store
from storage import closes as closes_store

NEIGHBOUR_DAYS = 31
"""Calendar days either side of a file's dates read back to judge suspect moves."""


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
        closes_store.sync_instruments(conn, instrument_rows(settings))
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
