"""One closes file into the store: parse, validate, detect suspect ticks, write in one
transaction.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from monitor.config import Settings
from monitor.data.parse import FileFormat, ParsedFile, decompressed, parse_closes, read_bytes
from monitor.data.quality import find_suspects
from monitor.errors import IngestError
from monitor.pipeline.store import desk_today, instrument_rows
from storage import Store
from storage import closes as closes_store

NEIGHBOUR_DAYS = 31
"""Calendar days either side of a file's dates read back to judge suspect moves."""

MAX_NEIGHBOUR_RATIO = 1e4
"""A close more than this many times above or below its neighbouring close is refused, not
only flagged: no daily move of a traded price is that large, a unit or decimal-point error
is (common practice). Smaller big moves are accepted and reported as suspect ticks."""

STORED_PROBLEMS = 200
"""Problems kept with a batch in the store; the rest are counted in one closing line."""


def bounded(problems: list[str], limit: int = STORED_PROBLEMS) -> list[str]:
    """The first `limit` problems and, when there are more, a line saying how many."""
    if len(problems) <= limit:
        return list(problems)
    return [*problems[:limit], f"... and {len(problems) - limit} more problem(s) not shown"]


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
    notes: list[str] = field(default_factory=list)
    """Lines read as no close (an empty close): not errors, reported."""


def ingest_file(
    store: Store,
    settings: Settings,
    path: Path,
    *,
    layout: FileFormat = "auto",
    skip_bad: bool = False,
    today: dt.date | None = None,
    now: dt.datetime | None = None,
    data: bytes | None = None,
) -> IngestReport:
    """Validate one closes file and write it in one transaction.

    All-or-nothing by default: with any bad row nothing is written and IngestError lists
    every problem (a rejected batch is still recorded for the audit trail). With
    `skip_bad` the good rows are written and the rejects recorded in the batch. `data`
    gives the file's bytes directly (standard input); `path` then only names it.

    Whether a file was seen before is decided by its content against the store, not by
    its bytes: re-ingesting a file after a restatement puts its closes back.
    """
    now = now or dt.datetime.now(dt.UTC)
    today = today or desk_today(settings, now)
    strict = bool(settings.instruments) and not settings.sources.allow_new_symbols
    raw = read_bytes(path) if data is None else decompressed(path.name, data)
    parsed = parse_closes(
        path.name, raw, today=today,
        known_symbols=settings.symbols if strict else None, layout=layout,
        today_zone=settings.desk.timezone,
    )
    rows = parsed.rows
    report = IngestReport(file=str(path), rows_read=parsed.rows_read, rows_accepted=0,
                          rows_rejected=parsed.rows_rejected, notes=parsed.notes)
    # One write transaction from the first read: the diff and the neighbour checks see
    # exactly the closes this file's write goes on top of.
    with store.begin(immediate=True) as conn:
        existing = _neighbours(conn, rows)
        far = _implausible(parsed.name, existing, rows)
        if far:
            lines = {line for line, _ in far}
            parsed.problems = sorted([*parsed.problems, *(text for _, text in far)],
                                     key=lambda p: _line_of(parsed.name, p))
            parsed.rows_rejected += len(lines - set(parsed.bad_lines))
            rows = rows.loc[~rows["line"].isin(lines)].reset_index(drop=True)
        report.rows_rejected = parsed.rows_rejected
        report.problems = parsed.problems
        if parsed.problems and not skip_bad:
            closes_store.insert_batch(
                conn, file_name=_stored_name(path), sha256=parsed.sha256,
                rows_read=parsed.rows_read, rows_accepted=0,
                rows_rejected=parsed.rows_rejected, status="rejected",
                problems=bounded(parsed.problems), now=now,
            )
        else:
            _write(conn, settings, path, parsed, rows, existing, report, now)
    if parsed.problems and not skip_bad:
        raise IngestError(
            f"{path.name}: {len(parsed.problems)} bad value(s) on {parsed.rows_rejected} "
            "line(s); nothing from the file was written (--skip-bad writes the good rows)",
            parsed.problems,
        )
    return report


def _write(conn: Any, settings: Settings, path: Path, parsed: ParsedFile, rows: pd.DataFrame,
           existing: pd.DataFrame, report: IngestReport, now: dt.datetime) -> None:
    accepted = len(rows)
    report.rows_accepted = accepted
    fresh, restated = closes_store.diff_closes(existing, rows)
    if fresh.empty and restated.empty and not parsed.problems:
        report.already_ingested = True
        report.batch_id = closes_store.batch_for_sha(conn, parsed.sha256)
        report.closes_unchanged = accepted
        return
    closes_store.sync_instruments(conn, instrument_rows(settings))
    closes_store.ensure_symbols(conn, rows["symbol"].unique().tolist())
    suspects = find_suspects(existing, rows, settings.returns.suspect_move)
    batch_id = closes_store.insert_batch(
        conn, file_name=_stored_name(path), sha256=parsed.sha256, rows_read=parsed.rows_read,
        rows_accepted=accepted, rows_rejected=parsed.rows_rejected,
        status="partial" if parsed.problems else "accepted",
        problems=bounded(parsed.problems), now=now,
    )
    closes_store.write_closes(conn, batch_id, _stored_name(path), fresh, restated, suspects, now)
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


def _neighbours(conn: Any, rows: pd.DataFrame) -> pd.DataFrame:
    """Stored closes of the file's symbols around its dates (the diff and the move checks)."""
    if rows.empty:
        return rows[["symbol", "date", "close"]]
    margin = dt.timedelta(days=NEIGHBOUR_DAYS)
    return closes_store.read_closes_long(
        conn, sorted(rows["symbol"].unique().tolist()),
        rows["date"].min().date() - margin, rows["date"].max().date() + margin,
    )


def _stored_name(path: Path) -> str:
    """The file's path as the store keeps it (500 characters at most, the end kept)."""
    text = str(path)
    return text if len(text) <= 500 else "..." + text[-497:]


def _line_of(name: str, problem: str) -> int:
    """The line number of a `name:LINE: ...` problem (0 when it names none)."""
    number = problem[len(name) + 1:].split(":", 1)[0] if problem.startswith(name + ":") else ""
    return int(number) if number.isdigit() else 0


def _implausible(name: str, existing: pd.DataFrame, rows: pd.DataFrame,
                 ) -> list[tuple[int, str]]:
    """(line, problem) per close more than MAX_NEIGHBOUR_RATIO times off its neighbour."""
    limit = math.log(MAX_NEIGHBOUR_RATIO)
    far = find_suspects(existing, rows, limit)
    if far.empty:
        return []
    lines = rows.set_index(["symbol", "date"])["line"]
    problems = []
    for row in far.itertuples(index=False):
        key = (row.symbol, row.date)
        # A stored close right after a new one is judged against the new one: the new
        # close is the one refused, on its own line.
        if key not in lines.index:
            continue
        at = int(lines.loc[key])
        problems.append((at,
            f"{name}:{at}: close {row.close:g} for {row.symbol} on "
            f"{row.date.date()} is {math.exp(abs(row.log_return)):.3g} times its neighbouring "
            f"close {row.previous_close:g}; refused as implausible (more than "
            f"{MAX_NEIGHBOUR_RATIO:g} times)"
        ))
    return problems
