"""The digest's Data feed block: what did not arrive, since when, and what was refused.

The data-feed alert (no closes at all on a run date) and the ``stale`` rules' alerts are
about the data, not about a correlation: they have no value, band or level to show. The
digest lists them here as what they are, with the instruments concerned, their latest
close, how many business days they have been without one, and the closes files refused in
the last 24 hours with their first problems (file, line, field and value).

Pure: the pipeline passes the facts it read (:class:`FeedFacts`); nothing here reads the
store, the clock or the disk.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

from monitor.digest.facts import AlertFacts
from monitor.templating import tuple_fields

REFUSED_PROBLEMS_SHOWN = 5
"""Problems of one refused file printed in the digest; the rest are in its .problems.txt."""

REFUSED_WINDOW = dt.timedelta(hours=24)
"""Refused files listed: those refused in the 24 hours before the digest was made."""


@dataclass(frozen=True)
class RefusedFile:
    """One closes file the inbox refused (nothing from it was written), or one whose bad
    lines it skipped (the rest written).

    Attributes
    ----------
    name : str
        The file's name as it arrived.
    refused_at : datetime
        When it was refused (the time its problems file was written).
    problems : tuple of str
        Its first problems, each naming file, line, field and value.
    more : int
        Problems not shown here (they are in the problems file).
    report : str
        Name of the problems file beside it in ``rejected/`` (``processed/`` when written).
    written : bool
        The file's good rows were written and only the lines named were skipped
        (``[sources] skip_bad``); False: the whole file was refused.
    """

    name: str
    refused_at: dt.datetime
    problems: Sequence[str] = ()
    more: int = 0
    report: str = ""
    written: bool = False

    def __post_init__(self) -> None:
        tuple_fields(self, "problems")


@dataclass(frozen=True)
class FeedFacts:
    """What the pipeline read for the Data feed block.

    Attributes
    ----------
    last_close : mapping of str to date or None
        Each instrument's latest close on or before the run date (None: never).
    expected : sequence of str
        The instruments a close was expected from on the run date (their market open on
        a run date of the schedule); empty when no close was expected at all.
    refused : sequence of RefusedFile
        Files refused in the 24 hours before the digest, oldest first.
    feed_rule : str
        Name of the built-in data-feed alert's rule.
    """

    last_close: Mapping[str, dt.date | None] = field(default_factory=dict)
    expected: Sequence[str] = ()
    refused: Sequence[RefusedFile] = ()
    feed_rule: str = "data-feed"

    def __post_init__(self) -> None:
        tuple_fields(self, "expected", "refused")


@dataclass(frozen=True)
class FeedInstrument:
    """An instrument without a close on the run date."""

    symbol: str
    name: str
    last_close: dt.date | None
    business_days: int | None
    """Business days without a new close (None when unknown, e.g. never had one)."""


@dataclass(frozen=True)
class DataAlertView:
    """The data-feed alert or a ``stale`` rule's alert, as what it is.

    Attributes
    ----------
    id : int
    rule_name : str
    severity : str
    state : {"new", "open", "cleared"}
        Opened this evening, still open, or cleared this evening.
    opened : date
        First day of the alert.
    symbols : tuple of str
        The instruments concerned (a stale alert: its one instrument; the data-feed
        alert: every instrument without a close).
    what : str
        One line saying what is wrong, e.g. "no new close since 2026-03-02 (3 business
        days)".
    acknowledged_by : str or None
    """

    id: int
    rule_name: str
    severity: str
    state: str
    opened: dt.date
    symbols: Sequence[str]
    what: str
    acknowledged_by: str | None = None

    def __post_init__(self) -> None:
        tuple_fields(self, "symbols")


@dataclass(frozen=True)
class DataFeedView:
    """The Data feed block of one evening's digest (empty: nothing to say)."""

    run_date: dt.date
    alerts: Sequence[DataAlertView] = ()
    missing: Sequence[FeedInstrument] = ()
    refused: Sequence[RefusedFile] = ()

    def __post_init__(self) -> None:
        tuple_fields(self, "alerts", "missing", "refused")

    @property
    def empty(self) -> bool:
        """True when every expected close came, no data alert is listed and no file was
        refused."""
        return not (self.alerts or self.missing or self.refused)


def business_days_after(last: dt.date | None, day: dt.date, dates: Sequence[dt.date]
                        ) -> int | None:
    """Business days in `dates` after `last` up to and including `day` (None: no `last`)."""
    if last is None:
        return None
    return sum(1 for d in dates if last < d <= day)


def _days_text(count: int | None) -> str:
    if count is None:
        return ""
    return f" ({count} business day{'' if count == 1 else 's'})"


def build_feed(run_date: dt.date, facts: FeedFacts, alerts: Sequence[tuple[str, AlertFacts]],
               names: Mapping[str, str], run_dates: Sequence[dt.date],
               now: dt.datetime) -> DataFeedView:
    """The Data feed block.

    Parameters
    ----------
    run_date : date
        The day the evening run is for.
    facts : FeedFacts
        What the pipeline read.
    alerts : sequence of (state, AlertFacts)
        The data alerts to list ("new", "open" or "cleared"), as the digest chose them.
    names : mapping of str to str
        Instrument names by symbol.
    run_dates : sequence of date
        Business days of the schedule up to `run_date` (for "N business days").
    now : datetime
        When the digest is made; files refused more than 24 hours before it are left out
        (one refused by the same run, a moment after `now`, is listed).
    """
    missing = [
        FeedInstrument(symbol, names.get(symbol, ""), facts.last_close.get(symbol),
                       business_days_after(facts.last_close.get(symbol), run_date, run_dates))
        for symbol in facts.expected
        if (facts.last_close.get(symbol) or dt.date.min) < run_date
    ]
    views = []
    for state, alert in alerts:
        rule, target = alert.rule, alert.target
        event = alert.event_today or {}
        if rule == facts.feed_rule:
            symbols = tuple(m.symbol for m in missing)
            latest = max((d for d in facts.last_close.values() if d is not None), default=None)
            if state == "cleared":
                what = f"closes for {run_date} arrived; the feed is back"
            else:
                what = (f"no closes for {run_date} by run time; the latest closes are from "
                        f"{latest or 'never'}")
        else:
            symbols = (target,)
            last = facts.last_close.get(target)
            value = event.get("value")
            count = (int(value) if isinstance(value, int | float) and math.isfinite(value)
                     else business_days_after(last, run_date, run_dates))
            if state == "cleared":
                what = f"closes of {target} are coming again (latest {last or 'never'})"
            else:
                what = (f"no new or no changed close of {target} since {last or 'never'}"
                        f"{_days_text(count)}")
        views.append(DataAlertView(
            id=alert.id, rule_name=rule, severity=alert.severity, state=state,
            opened=alert.opened_on, symbols=symbols, what=what,
            acknowledged_by=alert.acknowledged_by))
    refused = [f for f in facts.refused if f.refused_at >= now - REFUSED_WINDOW]
    return DataFeedView(run_date=run_date, alerts=views, missing=missing, refused=refused)


__all__ = [
    "REFUSED_PROBLEMS_SHOWN",
    "DataAlertView",
    "DataFeedView",
    "FeedFacts",
    "FeedInstrument",
    "RefusedFile",
    "build_feed",
]
