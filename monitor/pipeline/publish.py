"""The evening's outputs from the store: the digest (files, outbox, sending) and the history
pages.
"""

from __future__ import annotations

import datetime as dt
import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from monitor.calendar import Schedule
from monitor.config import Settings
from monitor.data.quality import stale_inputs
from monitor.data.returns import closes_to_returns
from monitor.errors import ComoveError, ConfigError
from monitor.pipeline.evaluate import build_plan
from monitor.pipeline.store import FEED_RULE, read_closes, read_returns, schedule_of, universe
from monitor.templating import SCREENFUL
from storage import Store
from storage import alerts as alerts_store
from storage import closes as closes_store
from storage import outbox as outbox_store
from storage import runs as runs_store

LOG = logging.getLogger("comove.publish")

STALE_DAYS_NOTED = 3
"""Business days without a new close after which the digest lists an instrument as stale
(common practice for daily data; a `stale` rule can alert on its own threshold)."""


@dataclass
class DigestOutcome:
    """A rendered (and perhaps sent) digest."""

    as_of: dt.date
    folder: Path
    paths: Any
    subject: str
    outbox_id: int | None = None
    status: str = "rendered"  # rendered | sent | failed | already sent | maybe sent
    attempts: int = 0
    error: str = ""


def _data_issues(store: Store, panel: pd.DataFrame, day: dt.date, as_of: dt.date,
                 now: dt.datetime, schedule: Schedule) -> tuple[list[Any], str]:
    from monitor.digest import DataIssueView

    issues: list[DataIssueView] = []
    if panel.empty:
        return issues, "no closes in the store"
    without, unchanged = stale_inputs(panel)
    row = len(panel) - 1
    last_dates = {s: panel[s].last_valid_index() for s in panel.columns}
    for k, symbol in enumerate(panel.columns):
        gap = without[row, k]
        last = last_dates[symbol]
        if np.isfinite(gap) and gap >= STALE_DAYS_NOTED and last is not None:
            issues.append(DataIssueView("stale", symbol, last.date(),
                                        f"no new close for {int(gap)} business days"))
        elif np.isfinite(gap) and gap >= 1 and last is not None:
            issues.append(DataIssueView("missing", symbol, day, "no close on this day; last "
                                        f"close {last.date()}"))
        if np.isfinite(unchanged[row, k]) and unchanged[row, k] >= 5 and gap == 0:
            issues.append(DataIssueView("stale", symbol, day, "close unchanged for "
                                        f"{int(unchanged[row, k])} business days"))
    recent = pd.Timestamp(day) - pd.Timedelta(days=10)
    with store.connect() as conn:
        suspects = closes_store.list_suspects(conn)
        revisions = closes_store.list_revisions(conn)
    for r in suspects.itertuples():
        if recent <= pd.Timestamp(r.date) <= pd.Timestamp(day):
            issues.append(DataIssueView(
                "suspect", r.symbol, r.date, f"close {r.close:g} after {r.previous_close:g} "
                f"(log return {r.log_return:+.3f}); accepted, please check"))
    week_ago = now - dt.timedelta(days=7)
    for r in revisions.itertuples():
        revised = r.revised_at if r.revised_at.tzinfo else r.revised_at.replace(tzinfo=dt.UTC)
        if week_ago <= revised <= now:
            issues.append(DataIssueView("restated", r.symbol, r.date,
                                        f"close restated {r.old_close:g} -> {r.new_close:g} "
                                        f"from {Path(r.source_file).name}"))
    issues += _retracted_issues(store, as_of)
    attention = ""
    if day < as_of and schedule.is_run_date(as_of):
        attention = (f"No closes for {as_of}: the latest closes are from {day}. "
                     "Check the data feed before reading the numbers below.")
    elif any(i.kind in ("stale", "missing") for i in issues):
        count = len({i.symbol for i in issues if i.kind in ("stale", "missing")})
        attention = f"{count} instrument(s) have stale or missing closes; see Data quality."
    return issues, attention


CALENDAR_PAIRS_LISTED = 5
"""Pairs named one by one in the digest's calendar note; the rest are counted."""


def _calendar_issues(returns: pd.DataFrame, pairs: np.ndarray, measures: Sequence[str],
                     day: dt.date) -> list[Any]:
    """Data-quality lines for monitored pairs whose latest window lost dates because one
    side had a close and the other had none (different market holidays), instead of
    silence: the worst few by name, the others counted."""
    from monitor.data.quality import calendar_losses
    from monitor.digest import DataIssueView
    from monitor.engine import parse_measure

    if returns.empty or not len(pairs):
        return []
    windows = [parse_measure(m).window for m in measures]
    measure, window = next(((m, w) for m, w in zip(measures, windows, strict=True) if w),
                           ("a 63-date window", 63))
    lost, _ = calendar_losses(returns.to_numpy(dtype=np.float64), pairs, int(window))
    affected = np.flatnonzero(lost > 0)
    if not affected.size:
        return []
    symbols = [str(c) for c in returns.columns]
    order = affected[np.argsort(-lost[affected], kind="stable")]
    issues = [
        DataIssueView("calendar", f"{symbols[pairs[k, 0]]}/{symbols[pairs[k, 1]]}", day,
                      f"{measure} window spans {int(lost[k])} day"
                      f"{'' if lost[k] == 1 else 's'} with a close on one side only "
                      "(market holidays differ); the pair uses its common dates, the other "
                      "side's return spans the closure")
        for k in order[:CALENDAR_PAIRS_LISTED]
    ]
    more = order.size - CALENDAR_PAIRS_LISTED
    if more > 0:
        issues.append(DataIssueView(
            "calendar", f"{more} more pair{'' if more == 1 else 's'}", day,
            f"also lost dates to calendar differences in the {measure} window"))
    return issues


def _retracted_issues(store: Store, as_of: dt.date) -> list[Any]:
    """Alerts retracted since the previous evening's digest (after it, through `as_of`):
    a reader who saw them announced learns they are gone, why, and that the id stays."""
    from monitor.digest import DataIssueView

    with store.connect() as conn:
        earlier = [d for d in alerts_store.digest_days(conn) if d < as_of]
        since = earlier[-1] if earlier else dt.date.min
        rows = [a for a in alerts_store.list_alerts(conn)
                if a.state == alerts_store.RETRACTED and a.retracted_on is not None
                and since < a.retracted_on <= as_of]
    return [DataIssueView(
        "retracted", a.target, a.opened_on,
        f"alert {a.id} ({a.rule}, opened {a.opened_on}) retracted: {a.retracted_reason}; "
        f"its id{' and acknowledgement' if a.acknowledged_by else ''} are kept "
        f"(comove alerts --all)") for a in rows]


def _refused_files(settings: Settings, now: dt.datetime) -> list[Any]:
    """Closes files the inbox refused in the 24 hours before `now`, from the problems
    reports beside them in ``rejected/`` (first line: the verdict; then one problem per
    line, naming file, line, field and value), and accepted files whose bad lines were
    skipped (``[sources] skip_bad``: their reports sit in ``processed/``)."""
    from monitor.digest.feed import REFUSED_PROBLEMS_SHOWN, REFUSED_WINDOW, RefusedFile

    refused = []
    reports = [(report, folder == "processed")
               for folder in ("rejected", "processed") if (settings.inbox / folder).is_dir()
               for report in (settings.inbox / folder).glob("*.problems.txt")]
    for report, written in reports:
        at = dt.datetime.fromtimestamp(report.stat().st_mtime, dt.UTC)
        if at < now - REFUSED_WINDOW:
            continue  # (a file refused by this very run is later than `now`: it is listed)
        lines = [line for line in report.read_text(encoding="utf-8",
                                                   errors="replace").splitlines() if line]
        problems = lines[1:] or lines[:1]
        more = 0
        if problems and problems[-1].startswith("... and "):
            more = int(problems[-1].split()[2]) if problems[-1].split()[2].isdigit() else 0
            problems = problems[:-1]
        more += max(0, len(problems) - REFUSED_PROBLEMS_SHOWN)
        refused.append(RefusedFile(
            name=report.name.removesuffix(".problems.txt"), refused_at=at,
            problems=problems[:REFUSED_PROBLEMS_SHOWN], more=more, report=report.name,
            written=written))
    return sorted(refused, key=lambda f: (f.refused_at, f.name))


def _feed_facts(settings: Settings, panel: pd.DataFrame, as_of: dt.date,
                now: dt.datetime) -> tuple[Any, list[dt.date]]:
    """What the digest's Data feed block needs, and the run dates it counts days in."""
    from monitor.calendar import any_market_open, business_days_between
    from monitor.digest.feed import FeedFacts

    schedule = schedule_of(settings)
    last_close: dict[str, dt.date | None] = {}
    for symbol in panel.columns:
        last = panel[symbol].last_valid_index()
        last_close[str(symbol)] = None if last is None else pd.Timestamp(last).date()
    calendars = {i.symbol: i.calendar for i in settings.instruments}
    expected: list[str] = []
    if schedule.is_run_date(as_of):
        open_on = {code: any_market_open([code], as_of)
                   for code in set(calendars.values())} | {"": True}
        expected = [s for s in last_close if open_on[calendars.get(s, "")]]
    known = [d for d in last_close.values() if d is not None]
    run_dates = business_days_between(schedule, min(known), as_of) if known else []
    return FeedFacts(last_close=last_close, expected=expected,
                     refused=_refused_files(settings, now), feed_rule=FEED_RULE), run_dates


def digest_context(store: Store, settings: Settings, as_of: dt.date,
                   now: dt.datetime | None = None) -> Any:
    """The digest's context for `as_of` from the store (see monitor.digest.build)."""
    from monitor.digest import AlertFacts, DigestInputs, build_context

    now = now or dt.datetime.now(dt.UTC)
    symbols = universe(store, settings)
    plan = build_plan(settings, symbols)
    panel = read_closes(store, symbols, None, as_of)
    r = settings.returns
    returns = closes_to_returns(panel, kind=r.kind, horizon=r.horizon,
                                fill_limit=r.fill_limit,
                                max_gap=r.max_gap)
    if returns.empty:
        raise ComoveError(f"no returns on or before {as_of}: ingest closes first")
    day = returns.index[-1].date()
    names = {i.symbol: i.name for i in settings.instruments}
    with store.connect() as conn:
        rows = alerts_store.list_alerts(conn, open_on=day)
        if as_of > day:
            # The data-feed alert is about the days after the last close itself.
            rows += [a for a in alerts_store.list_alerts(conn, open_on=as_of, rule=FEED_RULE)
                     if a.opened_on > day]
        today_events = alerts_store.events_for(conn, date=day)
    by_alert: dict[int, dict[str, Any]] = {}
    for event in today_events:
        by_alert[event["alert_id"]] = event
    facts = [
        AlertFacts(
            id=a.id, rule=a.rule, target=a.target, opened_on=a.opened_on,
            first_breach_on=a.first_breach_on,
            # As the evening of `day` saw it, whatever happened to the alert later.
            state="cleared" if a.cleared_on in (day, as_of) else "open",
            cleared_on=a.cleared_on if a.cleared_on in (day, as_of) else None,
            severity=a.severity, rule_kind=a.rule_kind,
            announced=bool(by_alert.get(a.id, {}).get("announce", a.announced)),
            acknowledged_by=_acked_by(a, day), acknowledged_at=a.acknowledged_at
            if _acked_by(a, day) else None,
            acknowledged_note=a.acknowledged_note if _acked_by(a, day) else None,
            reminded_today=by_alert.get(a.id, {}).get("event") == "continuing",
            event_today=by_alert.get(a.id),
        )
        for a in rows
        if a.rule in plan.rule_names and a.opened_on <= day or a.rule == FEED_RULE
    ]
    issues, attention = _data_issues(store, panel, day, as_of, now, schedule_of(settings))
    feed, run_dates = _feed_facts(settings, panel, as_of, now)
    issues += _calendar_issues(returns, plan.pairs, settings.correlation.measures, day)
    c = settings.correlation
    inputs = DigestInputs(
        desk=settings.desk.name, as_of=as_of, generated_at=now, returns=returns,
        names=names, groups=settings.groups, rules={rule.name: rule for rule in plan.rules},
        alerts=facts, monitored_pairs=plan.pairs, measures=c.measures, return_kind=r.kind,
        horizon=r.horizon, level=c.level, largest_changes_days=c.largest_changes_days,
        group_average_days=c.group_average_days,
        history_days=c.history_days, data_issues=issues, attention=attention,
        data_through=panel.index[-1].date(), feed=feed, run_dates=run_dates,
        pages_url=settings.pages.site_url,
    )
    return build_context(inputs)


def _acked_by(alert: alerts_store.AlertRow, day: dt.date) -> str | None:
    """Who had acknowledged the alert by the end of `day` (None: nobody yet)."""
    at = alert.acknowledged_at
    if at is None:
        return None
    return alert.acknowledged_by if at.date() <= day else None


def digest_folder(settings: Settings, as_of: dt.date) -> Path:
    return settings.resolve_path(settings.digest.folder) / as_of.isoformat()


def render_digest_files(store: Store, settings: Settings, as_of: dt.date,
                        out_dir: Path | None = None, now: dt.datetime | None = None
                        ) -> DigestOutcome:
    """Render the digest for `as_of` into a folder: digest.html with PNGs, .txt and .eml."""
    from monitor.digest import RenderedDigest, build_message, fit_email, write_digest

    now = now or dt.datetime.now(dt.UTC)
    ctx = digest_context(store, settings, as_of, now)
    d = settings.digest

    def build(rendered: RenderedDigest) -> Any:
        return build_message(rendered, sender=d.sender, recipients=list(d.recipients) or
                             [d.sender], date=now, message_id_domain=_domain(d.sender))

    fitted = fit_email(ctx, build, d.max_email_bytes)
    rendered, message = fitted.rendered, fitted.message
    if fitted.charts_left_out or fitted.limit < SCREENFUL:
        LOG.info("digest %s: %d bytes with %d charts and up to %d alerts per list in full "
                 "(digest.max_email_bytes %d)", as_of, fitted.size, fitted.charts,
                 fitted.limit, d.max_email_bytes)
    if not fitted.fits:
        LOG.warning("digest %s: %d bytes, over digest.max_email_bytes %d even with one alert "
                    "per list and no charts; sending it as it is", as_of, fitted.size,
                    d.max_email_bytes)
    folder = out_dir or digest_folder(settings, as_of)
    paths = write_digest(rendered, folder, message=message)
    return DigestOutcome(as_of=as_of, folder=Path(folder), paths=paths,
                         subject=rendered.subject)


def _domain(address: str) -> str:
    return address.rpartition("@")[2] or "localhost"


def send_digest(
    store: Store,
    settings: Settings,
    as_of: dt.date,
    *,
    resend: bool = False,
    environ: dict[str, str] | None = None,
    sleep: Callable[[float], None] = time.sleep,
    now: dt.datetime | None = None,
) -> DigestOutcome:
    """Render, store in the outbox, then send the digest for `as_of`.

    A date whose digest was sent is not sent again unless `resend`. A digest already in
    the outbox as pending or failed is sent as stored (so a retry sends what was rendered
    when the day was evaluated). A failed send stays in the outbox with its error and
    raises MailError; the next call retries it. A send cut off after the server took the
    whole message is recorded as "maybe sent" (status "maybe sent", no exception) and
    counts as sent: only `resend` sends it again.
    """
    import os

    from monitor.digest import MailError, SmtpSettings, send_message

    now = now or dt.datetime.now(dt.UTC)
    d = settings.digest
    if not d.recipients:
        raise ComoveError("digest.recipients is empty: nothing to send (comove digest --out "
                          "DIR renders it without sending)")
    env = dict(os.environ) if environ is None else environ
    password = None
    if d.username:
        if not d.password_env:
            raise ConfigError("digest.password_env: name the environment variable that holds "
                              "the SMTP password for digest.username")
        password = env.get(d.password_env)
        if password is None:
            raise ConfigError(f"digest.password_env: environment variable {d.password_env} is "
                              "not set")
    with store.connect() as conn:
        sent = outbox_store.sent_for(conn, as_of)
        waiting = [row for row in outbox_store.for_date(conn, as_of)
                   if row.status in ("pending", "failed")]
    if sent is not None and not resend:
        status = "maybe sent" if sent.status == outbox_store.MAYBE_SENT else "already sent"
        return DigestOutcome(as_of=as_of, folder=Path(sent.folder), paths=None,
                             subject=sent.subject, outbox_id=sent.id, status=status,
                             error=sent.last_error)
    if waiting and not resend:
        row = waiting[-1]
        outbox_id, raw, subject, folder = row.id, row.message, row.subject, Path(row.folder)
        paths = None
    else:
        outcome = render_digest_files(store, settings, as_of, now=now)
        raw = outcome.paths.eml.read_bytes()
        subject, folder, paths = outcome.subject, outcome.folder, outcome.paths
        with store.begin() as conn:
            outbox_id = outbox_store.add(conn, as_of=as_of, subject=subject,
                                         recipients=list(d.recipients), folder=str(folder),
                                         message=raw, now=now)
    message = _parse_eml(raw)
    smtp = SmtpSettings(host=d.smtp_host, port=d.smtp_port,
                        security=d.security,
                        username=d.username or None, password_env=d.password_env or None)
    context = None
    if d.ca_file:
        import ssl

        context = ssl.create_default_context(cafile=str(settings.resolve_path(d.ca_file)))
    try:
        result = send_message(message, smtp, password=password, attempts=d.attempts,
                              backoff_seconds=d.backoff_seconds, sleep=sleep,
                              ssl_context=context)
    except MailError as exc:
        if exc.maybe_sent:
            # Never sent again by itself: the desk may already have it (--resend forces).
            with store.begin() as conn:
                outbox_store.mark_maybe_sent(conn, outbox_id, attempts=exc.attempts,
                                             error=str(exc), now=now)
            return DigestOutcome(as_of=as_of, folder=folder, paths=paths, subject=subject,
                                 outbox_id=outbox_id, status="maybe sent",
                                 attempts=exc.attempts, error=str(exc))
        with store.begin() as conn:
            outbox_store.mark_failed(conn, outbox_id, attempts=exc.attempts, error=str(exc))
        raise
    with store.begin() as conn:
        outbox_store.mark_sent(conn, outbox_id, attempts=result.attempts, now=now)
    return DigestOutcome(as_of=as_of, folder=folder, paths=paths, subject=subject,
                         outbox_id=outbox_id, status="sent", attempts=result.attempts)


def _parse_eml(raw: bytes) -> Any:
    from email import message_from_bytes
    from email.policy import SMTP

    return message_from_bytes(raw, policy=SMTP)


def build_pages(store: Store, settings: Settings, out_dir: Path,
                now: dt.datetime | None = None) -> Any:
    """Rebuild the history site in `out_dir` from the store, with the digest archive."""
    import shutil

    from monitor.pages import DigestLink, SiteInputs, build_site, build_site_context

    now = now or dt.datetime.now(dt.UTC)
    symbols = universe(store, settings)
    plan = build_plan(settings, symbols)
    returns = read_returns(store, settings, symbols)
    with store.connect() as conn:
        alerts = alerts_store.list_alerts(conn)
        events = alerts_store.events_for(conn)
        acks = alerts_store.list_acknowledgements(conn)
        runs = runs_store.list_runs(conn)
        mutes = alerts_store.list_mutes(conn)
        waiting = {row.as_of: row for row in outbox_store.unsent(conn)}
    # The digest archive: each rendered digest folder is copied beside the pages.
    archive = out_dir / "digests"
    links = []
    source = settings.resolve_path(settings.digest.folder)
    if source.is_dir():
        for folder in sorted(p for p in source.iterdir() if (p / "digest.html").is_file()):
            target = archive / folder.name
            if target.exists():
                shutil.rmtree(target)
            shutil.copytree(folder, target)
            try:
                day = dt.date.fromisoformat(folder.name)
            except ValueError:
                continue
            subject = _digest_subject(folder)
            status = "not sent yet" if day in waiting else ""
            links.append(DigestLink(as_of=day, path=f"digests/{folder.name}/digest.html",
                                    subject=subject, status=status))
    inputs = SiteInputs(
        desk=settings.desk.name, generated_at=now, returns=returns,
        names={i.symbol: i.name for i in settings.instruments}, groups=settings.groups,
        rules=plan.rules, rule_tables=settings.rule_tables,
        alerts=alerts, events=events, acknowledgements=acks, runs=runs, digests=links,
        measures=settings.correlation.measures, return_kind=settings.returns.kind,
        level=settings.correlation.level, mutes=mutes, watch=settings.desk.watch,
        charted_pairs=settings.desk.charted_pairs,
    )
    LOG.info("pages: %d alerts, %d events; computing the pairs' histories", len(alerts),
             len(events))
    ctx = build_site_context(inputs)
    LOG.info("pages: %d pair pages (%d with charts), %d other targets", len(ctx.pairs),
             sum(1 for page in ctx.pairs if page.measures), len(ctx.targets))
    return build_site(ctx, out_dir)


def _digest_subject(folder: Path) -> str:
    from email import message_from_bytes
    from email.policy import default

    eml = folder / "digest.eml"
    if not eml.is_file():
        return ""
    return str(message_from_bytes(eml.read_bytes(), policy=default).get("Subject", ""))
