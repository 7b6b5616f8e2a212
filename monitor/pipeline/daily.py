"""The daily run: collect the inbox, the data-feed alert, evaluate, publish, and catch up
missed days.
"""

from __future__ import annotations

import datetime as dt
import logging
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from monitor.config import Settings
from monitor.errors import IngestError, MailError
from monitor.pipeline.evaluate import EvaluationReport, evaluate_range
from monitor.pipeline.ingest import IngestReport, bounded, ingest_file
from monitor.pipeline.lease import evaluation_lease, renew
from monitor.pipeline.publish import DigestOutcome, build_pages, render_digest_files, send_digest
from monitor.pipeline.store import FEED_RULE, desk_today, pages_folder, schedule_of
from storage import Store, StoreError
from storage import alerts as alerts_store
from storage import closes as closes_store
from storage import outbox as outbox_store
from storage import runs as runs_store

LOG = logging.getLogger("comove.daily")


@dataclass
class CollectReport:
    accepted: list[IngestReport] = field(default_factory=list)
    rejected: list[tuple[Path, str]] = field(default_factory=list)
    skipped: list[tuple[Path, int]] = field(default_factory=list)
    """Accepted files whose bad lines were skipped (`[sources] skip_bad`), with the count."""


def collect_inbox(store: Store, settings: Settings, *, today: dt.date | None = None,
                  now: dt.datetime | None = None) -> CollectReport:
    """Ingest every file in the inbox (each all-or-nothing), oldest closes first, then move
    it to `processed/` or to `rejected/` with a `.problems.txt` report beside it.

    `today` is the latest date a close may carry (closes after it are refused as future);
    it defaults to the desk's date by the real clock, never earlier.

    A file never stays in the inbox to fail again the next evening: whatever its content
    makes go wrong, it is rejected with the reason. Only a store that cannot be written
    (unreachable, or locked beyond the busy timeout) leaves the files for the next run.
    """
    inbox = settings.inbox
    inbox.mkdir(parents=True, exist_ok=True)
    report = CollectReport()
    files = inbox_files(inbox)
    for path in files:
        try:
            result = ingest_file(store, settings, path, today=today, now=now,
                                 skip_bad=settings.sources.skip_bad)
        except StoreError:
            raise
        except Exception as exc:
            if isinstance(exc, IngestError):
                lines = [str(exc), *bounded(exc.problems, PROBLEMS_FILE_LINES)]
            else:
                # Not foreseen by the parser: a defect, but the file must not block the inbox.
                LOG.error("%s: unexpected %s while ingesting: %s", path.name,
                          type(exc).__name__, exc)
                lines = [f"{path.name}: could not be ingested (unexpected "
                         f"{type(exc).__name__}: {exc}); nothing from the file was written"]
            target = _move(path, inbox / "rejected")
            (target.parent / f"{target.name}.problems.txt").write_text(
                "\n".join(lines) + "\n", encoding="utf-8")
            report.rejected.append((target, lines[0]))
            continue
        target = _move(path, inbox / "processed")
        if result.problems:
            # `[sources] skip_bad`: the good rows are in; every skipped line is said out loud.
            count = len(result.problems)
            verdict = (f"{path.name}: {count} line(s) skipped, the other "
                       f"{result.rows_accepted} row(s) written")
            (target.parent / f"{target.name}.problems.txt").write_text(
                "\n".join([verdict, *bounded(result.problems, PROBLEMS_FILE_LINES)]) + "\n",
                encoding="utf-8")
            LOG.warning("%s (first: %s)", verdict, result.problems[0])
            report.skipped.append((target, count))
        if result.notes:
            # An empty close is no close, not an error; the gap is still said out loud.
            LOG.warning("%s: %d empty close(s) read as no close (first: %s)", path.name,
                        len(result.notes), result.notes[0])
        report.accepted.append(result)
    return report


def inbox_files(inbox: Path) -> list[Path]:
    """The closes files waiting in `inbox`, in date order: by the latest date each holds,
    then by modification time (a restatement dropped after the original comes after it),
    then by name. A file whose dates cannot be read goes last; ingesting it says why."""
    files = [p for p in inbox.iterdir()
             if p.is_file() and p.name.lower().endswith(INBOX_SUFFIXES)]
    if len(files) < 2:
        return files

    def key(path: Path) -> tuple[dt.date, float, str]:
        return (_latest_date(path) or dt.date.max, path.stat().st_mtime, path.name)

    return sorted(files, key=key)


def _latest_date(path: Path) -> dt.date | None:
    from monitor.data.parse import parse_closes, read_bytes

    try:
        parsed = parse_closes(path.name, read_bytes(path), today=dt.date.max,
                              known_symbols=None)
    except Exception:  # only the order is at stake here; ingest reports the fault itself
        return None
    if parsed.rows.empty:
        return None
    return pd.Timestamp(parsed.rows["date"].max()).date()


INBOX_SUFFIXES = (".csv", ".csv.gz")
"""File names read from the inbox, in any letter case (PRICES.CSV too)."""

PROBLEMS_FILE_LINES = 1000
"""Problems written to a rejected file's `.problems.txt`; the rest are counted."""


def _move(path: Path, folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / path.name
    if target.exists():
        stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%S%f")
        target = folder / f"{stamp}-{path.name}"
    path.replace(target)
    return target


@dataclass
class DailyReport:
    as_of: dt.date
    status: str  # done | already done | failed
    run_id: int | None = None
    collected: CollectReport | None = None
    evaluation: EvaluationReport | None = None
    digest: DigestOutcome | None = None
    feed_problem: str = ""
    feed_event: str = ""
    """What the run did to the data-feed alert: "opened", "continuing", "cleared" or ""."""
    pages: Any = None
    message: str = ""
    digest_error: str = ""


def _feed_alert(store: Store, settings: Settings, as_of: dt.date, last_close: dt.date | None,
                ) -> tuple[str, str]:
    """Open (or keep open) the data-feed alert when `as_of` has no closes; clear it when
    closes are there again. Returns the problem text ('' when the feed is fine) and the
    event written ("opened", "continuing", "cleared" or "" for none)."""
    with store.begin() as conn:
        open_alerts = [a for a in alerts_store.list_alerts(conn, open_only=True, rule=FEED_RULE)]
        if last_close is not None and last_close >= as_of:
            for alert in open_alerts:
                alerts_store.write_events(conn, [_feed_event(alert.opened_on, as_of, "cleared",
                                                             last_close)])
                alerts_store.refresh_states(conn, [alert.id])
            return "", "cleared" if open_alerts else ""
        problem = (f"no new closes for {as_of} by run time; latest closes are from "
                   f"{last_close or 'never'}")
        opened = open_alerts[0].opened_on if open_alerts else as_of
        event = "continuing" if open_alerts else "opened"
        alerts_store.delete_events_on(conn, [FEED_RULE], as_of)
        ids = alerts_store.write_events(conn, [_feed_event(opened, as_of, event, last_close)])
        alerts_store.refresh_states(conn, ids)
    return problem, event


def market_closed_reason(settings: Settings, day: dt.date) -> str:
    """Why no closes are expected on `day` ('' when they are): not a run date of the
    schedule (a weekend, a listed holiday, a holiday of `[schedule] calendar`), or every
    instrument's exchange calendar is shut (a New Year's Day)."""
    from monitor.calendar import any_market_open

    if not schedule_of(settings).is_run_date(day):
        return "not a run date of the schedule"
    calendars = [inst.calendar for inst in settings.instruments]
    if not any_market_open(calendars, day):
        return "every instrument's market is shut (" + ", ".join(dict.fromkeys(calendars)) + ")"
    return ""


def _feed_event(opened: dt.date, day: dt.date, event: str,
                last_close: dt.date | None) -> alerts_store.EventRow:
    held = (day - opened).days + 1
    gap = float((day - last_close).days) if last_close else math.nan
    return alerts_store.EventRow(
        rule=FEED_RULE, target="all", opened=opened, first_breach=opened,
        rule_kind="stale", severity="critical", event=event, date=day, value=gap,
        level=1.0, low=math.nan, high=math.nan, n=math.nan, z=math.nan, p=math.nan,
        reference=math.nan, peak_value=gap, peak_date=day, days_held=held, announce=True)


def run_daily(
    store: Store,
    settings: Settings,
    as_of: dt.date,
    *,
    force: bool = False,
    send: bool = True,
    pages_dir: Path | None = None,
    now: dt.datetime | None = None,
    environ: dict[str, str] | None = None,
    sleep: Callable[[float], None] = time.sleep,
    wait_seconds: float = 0.0,
    inbox_through: dt.date | None = None,
) -> DailyReport:
    """The daily job: lease, collect the inbox, evaluate, digest (outbox, send), pages,
    ledger. Idempotent: a second run for a done as-of date changes nothing unless `force`.

    The inbox is read against the real today (the desk's date by the clock), or against
    `inbox_through` when that is later (the last day of a catch-up), never against a
    missed day being caught up: a later day's file is not refused as future.
    """
    moment = now or dt.datetime.now(dt.UTC)
    reading_day = max(as_of, desk_today(settings, moment), inbox_through or as_of)
    with store.connect() as conn:
        done = [r for r in runs_store.list_runs(conn, kind="daily", as_of=as_of, status="done")]
    if done and not force:
        return DailyReport(as_of=as_of, status="already done", run_id=done[-1].id,
                           message=f"the daily run for {as_of} is already done (run "
                                   f"{done[-1].id}); --force reruns it")
    with evaluation_lease(store, wait_seconds=wait_seconds) as owner:
        with store.begin() as conn:
            # Holding the lease, any run still marked running was cut short (its process
            # died): say so in the ledger instead of leaving it running forever.
            runs_store.close_unfinished(conn, now=dt.datetime.now(dt.UTC))
            run_id = runs_store.start_run(conn, kind="daily", as_of=as_of, range_start=None,
                                          params_hash="", now=moment)
        report = DailyReport(as_of=as_of, status="running", run_id=run_id)
        try:
            report.collected = collect_inbox(store, settings, today=reading_day, now=moment)
            renew(store, owner)
            with store.connect() as conn:
                last = closes_store.last_close_date(conn, as_of)
            closed = market_closed_reason(settings, as_of)
            if closed and (last is None or last < as_of):
                LOG.info("no data-feed check for %s: %s", as_of, closed)
            else:
                report.feed_problem, report.feed_event = _feed_alert(store, settings, as_of,
                                                                     last)
            if last is not None:
                report.evaluation = evaluate_range(store, settings, None, as_of, kind="evaluation",
                                                   now=lambda: dt.datetime.now(dt.UTC))
            renew(store, owner)
            if last is not None:
                if send and settings.digest.recipients:
                    report.digest = send_digest(store, settings, as_of, resend=force,
                                                environ=environ, sleep=sleep, now=moment)
                else:
                    report.digest = render_digest_files(store, settings, as_of, now=moment)
            if pages_dir is not None:
                report.pages = build_pages(store, settings, pages_dir, now=moment)
        except Exception as exc:
            with store.begin() as conn:
                runs_store.finish_run(conn, run_id, status="failed", now=dt.datetime.now(dt.UTC),
                                      counts=_daily_counts(report),
                                      error=f"{type(exc).__name__}: {exc}")
            raise
        report.status = "done"
        with store.begin() as conn:
            runs_store.finish_run(conn, run_id, status="done", now=dt.datetime.now(dt.UTC),
                                  counts=_daily_counts(report))
    return report


def _daily_counts(report: DailyReport) -> dict[str, object]:
    counts: dict[str, object] = {}
    if report.collected is not None:
        counts["files_accepted"] = len(report.collected.accepted)
        counts["files_rejected"] = len(report.collected.rejected)
        if report.collected.skipped:
            counts["lines_skipped"] = sum(n for _, n in report.collected.skipped)
        counts["closes_new"] = sum(r.closes_new for r in report.collected.accepted)
    if report.evaluation is not None:
        counts.update({f"evaluation_{k}": v for k, v in report.evaluation.counts().items()})
    if report.digest is not None:
        counts["digest"] = report.digest.status
    if report.feed_problem:
        counts["feed_problem"] = report.feed_problem
    if report.feed_event:
        counts["feed_alert"] = report.feed_event
    return counts


def last_completed_daily(store: Store) -> dt.date | None:
    with store.connect() as conn:
        done = runs_store.list_runs(conn, kind="daily", status="done")
    return max((r.as_of for r in done), default=None)


MAX_CATCH_UP_DAYS = 10
"""Missed run dates a catch-up runs one by one (each with its own digest); older missed
days are still evaluated by the first of them, but get no digest of their own (a desk
back after a long stop wants today's picture, not a pile of old emails)."""


def catch_up_start(store: Store, as_of: dt.date) -> dt.date | None:
    """The day after which run dates count as missed: the last completed daily run, or,
    in a store that never had one, the latest close on or before `as_of` (closes ingested
    or backfilled from the shell up to that day)."""
    last = last_completed_daily(store)
    if last is not None:
        return last
    with store.connect() as conn:
        return closes_store.last_close_date(conn, as_of)


def missed_days(store: Store, settings: Settings, through: dt.date) -> list[dt.date]:
    """The scheduled run dates after `catch_up_start` up to and including `through`, at
    most the last MAX_CATCH_UP_DAYS of them."""
    from monitor.calendar import business_days_between

    start = catch_up_start(store, through)
    if start is None or start >= through:
        return []
    days = business_days_between(schedule_of(settings), start, through)
    if len(days) > MAX_CATCH_UP_DAYS:
        LOG.warning("%d missed run dates from %s to %s: the last %d are run one by one "
                    "(the earlier ones are evaluated, without a digest of their own)",
                    len(days), days[0], days[-1], MAX_CATCH_UP_DAYS)
        days = days[-MAX_CATCH_UP_DAYS:]
    return days


def run_days(store: Store, settings: Settings, as_of: dt.date, *, force: bool = False,
             catch_up: bool = True, environ: dict[str, str] | None = None,
             sleep: Callable[[float], None] = time.sleep,
             now: dt.datetime | None = None) -> list[DailyReport]:
    """Run every missed scheduled day since the last completed run (each with its own
    ledger row and its own digest, oldest first), then `as_of`.

    Every day reads the inbox against the latest of these days (or the real today), so a
    day being caught up never refuses a later day's file as future. A digest that cannot
    be sent fails its day (the digest stays in the outbox, the next call retries it) but
    not the days after it: their closes, alerts and digests go ahead. Digests of earlier
    days still waiting in the outbox are retried first. Any other error stops the
    sequence.
    """
    days = missed_days(store, settings, as_of) if catch_up else []
    if as_of not in days:
        days.append(as_of)
    reports = []
    if settings.digest.recipients:
        reports += _retry_outbox(store, settings, before=days[0], environ=environ,
                                 sleep=sleep, now=now)
    for day in days:
        try:
            report = run_daily(store, settings, day, force=force and day == as_of,
                               pages_dir=pages_folder(settings), environ=environ,
                               sleep=sleep, now=now, inbox_through=days[-1])
        except MailError as exc:
            report = DailyReport(as_of=day, status="failed", digest_error=str(exc),
                                 message=f"the digest for {day} was not sent: {exc}; it "
                                         "stays in the outbox and the next run retries it")
        reports.append(report)
        trouble = report.status == "failed" or (
            report.digest is not None and report.digest.status == "maybe sent")
        LOG.log(logging.ERROR if trouble else logging.INFO, _describe_daily(report))
    return reports


def _retry_outbox(store: Store, settings: Settings, *, before: dt.date,
                  environ: dict[str, str] | None, sleep: Callable[[float], None],
                  now: dt.datetime | None) -> list[DailyReport]:
    """Send again the digests of days before `before` still waiting in the outbox (their
    day's run failed at sending; the days after went ahead)."""
    with store.connect() as conn:
        waiting = sorted({row.as_of for row in outbox_store.unsent(conn) if row.as_of < before})
    reports = []
    for day in waiting:
        report = DailyReport(as_of=day, status="retried")
        try:
            report.digest = send_digest(store, settings, day, environ=environ, sleep=sleep,
                                        now=now)
            report.message = f"the digest for {day} waiting in the outbox: {report.digest.status}"
        except MailError as exc:
            report.status = "failed"
            report.digest_error = str(exc)
            report.message = f"the digest for {day} is still not sent: {exc}"
        reports.append(report)
        LOG.log(logging.ERROR if report.status == "failed" else logging.INFO, report.message)
    return reports


def _describe_daily(report: DailyReport) -> str:
    if report.status in ("already done", "retried") or report.digest_error:
        return report.message
    parts = [f"daily run {report.run_id} for {report.as_of}: {report.status}"]
    if report.collected is not None:
        parts.append(f"{len(report.collected.accepted)} file(s) ingested, "
                     f"{len(report.collected.rejected)} rejected")
    if report.feed_problem:
        parts.append(f"DATA: {report.feed_problem}")
    if report.evaluation is not None or report.feed_event:
        # The data-feed alert is an alert of the run like any other: it counts.
        opened = (report.evaluation.opened if report.evaluation is not None else 0) + (
            report.feed_event == "opened")
        cleared = (report.evaluation.cleared if report.evaluation is not None else 0) + (
            report.feed_event == "cleared")
        parts.append(f"{opened} opened, {cleared} cleared")
    if report.digest is not None:
        parts.append(f"digest {report.digest.status}: {report.digest.folder}")
        if report.digest.status == "maybe sent":
            parts.append(f"{report.digest.error}; not sent again without "
                         "`comove digest --send --resend`")
    return "; ".join(parts)
