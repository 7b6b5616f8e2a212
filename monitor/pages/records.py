"""The parts the history pages are made of: instruments, alert rows, measure histories,
events, acknowledgements, drivers, runs and digest links (value objects, checked at
construction). The pages themselves are in :mod:`monitor.pages.context`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Literal

import numpy as np

from monitor._typing import Float1D, ReturnKind, Severity
from monitor.errors import ComoveError
from monitor.pages.paths import check_relative_path
from monitor.templating import tuple_fields

AlertState = Literal["open", "cleared", "retracted"]


TargetKind = Literal["pair", "group", "instrument"]


EventKind = Literal["opened", "continuing", "cleared", "retracted"]


RunKind = Literal["daily", "backfill"]


RunStatus = Literal["running", "done", "failed", "interrupted"]


ALERT_STATES: tuple[str, ...] = ("open", "cleared", "retracted")


STATE_LABELS: dict[str, str] = {
    "open": "open",
    "cleared": "cleared",
    "retracted": "retracted (a rerun no longer produces it)",
}
"""What the index filter offers for each state: a retracted alert needs its explanation."""


SEVERITIES: tuple[str, ...] = ("critical", "warning", "info")


TARGET_KINDS: tuple[str, ...] = ("pair", "group", "instrument")


EVENT_KINDS: tuple[str, ...] = ("opened", "continuing", "cleared", "retracted")


RUN_KINDS: tuple[str, ...] = ("daily", "backfill")


RUN_STATUSES: tuple[str, ...] = ("running", "done", "failed", "interrupted")


def check_word(field_name: str, value: str, allowed: Sequence[str]) -> None:
    if value not in allowed:
        raise ComoveError(f"{field_name}: {value!r} is not one of {', '.join(allowed)}")


@dataclass(frozen=True)
class InstrumentView:
    """An instrument as the pages name it.

    Attributes
    ----------
    symbol : str
        The desk's code, e.g. "KLV". Any text: it is escaped in HTML and never used as a
        file name directly (see `safe_name`).
    name : str
        Full name, e.g. "Kelvara Industrial"; "" when unknown.
    group : str
        The desk's group, e.g. "Industrials"; "" when none.
    """

    symbol: str
    name: str = ""
    group: str = ""


@dataclass(frozen=True)
class SiteParameters:
    """How the numbers were made, printed in every page's footer.

    Attributes
    ----------
    measures : tuple of str
        Measure specs in use, e.g. ("rolling:63", "ewma:hl=21").
    return_kind : {"log", "simple"}
        Kind of returns correlated.
    confidence_level : float
        Level of every band, strictly between 0 and 1 (e.g. 0.95).
    """

    measures: Sequence[str]
    return_kind: ReturnKind
    confidence_level: float = 0.95

    def __post_init__(self) -> None:
        tuple_fields(self, "measures")
        check_word("return_kind", self.return_kind, ("log", "simple"))
        if not 0.0 < self.confidence_level < 1.0:
            raise ComoveError(
                f"confidence_level: {self.confidence_level!r} is not between 0 and 1"
            )


@dataclass(frozen=True)
class AlertSummary:
    """One alert as a row of the index and of its rule's and target's pages.

    Attributes
    ----------
    id : int or str
        The alert's id in the store.
    state : {"open", "cleared", "retracted"}
        "retracted": a rerun over the same days no longer produces the alert.
    severity : {"critical", "warning", "info"}
        Written out as a word wherever it is shown.
    rule_name, rule_kind : str
        The desk's name of the rule (e.g. "utilities hedge") and its kind (e.g. "level").
    target_kind : {"pair", "group", "instrument"}
        What the rule watches: a pair, a group (group-average rules) or one instrument (stale data).
    target : tuple of str
        The two symbols of a pair, else the one group name or symbol.
    opened : date
        The alert's first day.
    cleared : date or None
        The day it cleared; None while open or when retracted.
    peak : float
        Most extreme value of the measure while the alert was open; NaN when unknown.
    acknowledged_by : str or None
        Who acknowledged it, None when nobody has.
    groups : tuple of str
        Groups the target belongs to, for the group filter; empty means "derive them from
        `SiteContext.groups`".
    measure : str
        The measure spec the rule watches, "" when the rule has none.
    p_value : float or None
        Evidence of a statistical alert on its first day: the p-value of the opening
        event; None when the rule gives none (or NaN was stored).
    excess : float
        Evidence of a level alert on its first day: |value - level| of the opening;
        NaN when unknown or the rule has no level.

    Notes
    -----
    The link to the target's page is not a field: `build_site` derives it (see
    `pair_page_path` and `target_page_path`), so it cannot point at a file that is not
    written.
    """

    id: int | str
    state: AlertState
    severity: Severity
    rule_name: str
    rule_kind: str
    target_kind: TargetKind
    target: Sequence[str]
    opened: date
    cleared: date | None = None
    peak: float = math.nan
    acknowledged_by: str | None = None
    groups: Sequence[str] = ()
    measure: str = ""
    p_value: float | None = None
    excess: float = math.nan

    def __post_init__(self) -> None:
        tuple_fields(self, "target", "groups")
        check_word("state", self.state, ALERT_STATES)
        check_word("severity", self.severity, SEVERITIES)
        check_word("target_kind", self.target_kind, TARGET_KINDS)
        expected = 2 if self.target_kind == "pair" else 1
        if len(self.target) != expected:
            raise ComoveError(
                f"target: {self.target_kind} alert {self.id!r} names {len(self.target)} "
                f"items, expected {expected}"
            )
        object.__setattr__(self, "peak", math.nan if self.peak is None else float(self.peak))

    @property
    def target_label(self) -> str:
        """"KLV/DUNQ" for a pair, else the group name or the symbol."""
        return "/".join(self.target)


@dataclass(frozen=True, eq=False)
class MeasureHistory:
    """The full history of one measure of a pair (or of a group average).

    Attributes
    ----------
    measure : str
        Measure spec, e.g. "rolling:63".
    dates : tuple of date, length T
        Business days, ascending.
    values, band_low, band_high : ndarray, shape (T,)
        The measure and its confidence band. NaN where there were too few observations:
        drawn as a gap and printed as "n/a", never as zero.
    levels : tuple of float
        Levels of the rules watching this measure, drawn as dashed lines.
    """

    measure: str
    dates: Sequence[date]
    values: Float1D
    band_low: Float1D
    band_high: Float1D
    levels: Sequence[float] = ()

    def __post_init__(self) -> None:
        tuple_fields(self, "dates", "levels")
        for name in ("values", "band_low", "band_high"):
            object.__setattr__(
                self, name, np.asarray(getattr(self, name), dtype=np.float64).reshape(-1)
            )
        lengths = {len(self.dates), self.values.size, self.band_low.size, self.band_high.size}
        if len(lengths) != 1:
            raise ComoveError(
                f"measures: {self.measure!r} has arrays of different lengths {sorted(lengths)}"
            )


@dataclass(frozen=True)
class AlertSpan:
    """A period an alert was open, shaded on the charts.

    Attributes
    ----------
    alert_id : int or str
        The alert.
    start : date
        Its first day.
    end : date or None
        The day it cleared; None while still open.
    rule_name : str
        The rule that raised it.
    severity : {"critical", "warning", "info"}
        Its severity.
    measure : str
        The measure whose chart it shades; "" shades every chart of the page.
    """

    alert_id: int | str
    start: date
    end: date | None
    rule_name: str
    severity: Severity
    measure: str = ""

    def __post_init__(self) -> None:
        check_word("severity", self.severity, SEVERITIES)


@dataclass(frozen=True)
class EventView:
    """One entry of an alert's event history.

    Attributes
    ----------
    day : date
        The business day.
    alert_id : int or str
        The alert.
    rule_name : str
        The rule.
    kind : {"opened", "continuing", "cleared", "retracted"}
        What happened; "continuing" is a reminder that the alert is still open;
        "retracted": a rerun on changed closes no longer produces the alert (the day it
        was retracted, with `detail` saying why).
    value : float
        The measure that day (NaN when unknown).
    level : float or None
        The level compared with, if the rule has one.
    band_low, band_high : float
        Confidence band of `value`; NaN when unknown.
    p_value : float or None
        For shift rules: probability of a change at least this large with no real change.
    observations : float or None
        Observation count n (or Kish effective count for EWMA) behind `value`.
    detail : str
        One more sentence for a person (why a retracted alert was retracted); "" for none.
    """

    day: date
    alert_id: int | str
    rule_name: str
    kind: EventKind
    value: float
    level: float | None = None
    band_low: float = math.nan
    band_high: float = math.nan
    p_value: float | None = None
    observations: float | None = None
    detail: str = ""

    def __post_init__(self) -> None:
        check_word("kind", self.kind, EVENT_KINDS)


@dataclass(frozen=True)
class AckView:
    """An acknowledgement of an alert.

    Attributes
    ----------
    alert_id : int or str
        The alert.
    by : str
        Who acknowledged it.
    at : datetime
        When (shown with its own offset when aware).
    note : str
        What they wrote; may span lines (shown as written, escaped).
    """

    alert_id: int | str
    by: str
    at: datetime
    note: str = ""


@dataclass(frozen=True)
class DriverRow:
    """One day that moved an alert's correlation.

    Attributes
    ----------
    day : date
        The business day.
    contribution : float
        That day's share of the correlation value (same units as r, the pipeline's
        definition); NaN prints as "n/a".
    return_a, return_b : float
        Returns of the pair's first and second instrument that day, as fractions
        (0.012 is 1.2 %).
    """

    day: date
    contribution: float
    return_a: float
    return_b: float


@dataclass(frozen=True)
class DriversView:
    """The days that moved one alert's value most, as of one day.

    Attributes
    ----------
    alert_id : int or str
        The alert.
    day : date
        The day the drivers were computed for (usually the alert's first day).
    rows : tuple of DriverRow
        In the order to show them (the pipeline ranks them).
    measure : str
        The measure the contributions explain.
    other_days, other_sum : int, float
        The window's other dates and the sum of their contributions: the rows plus this
        remainder add up to ``total``.
    total : float
        The measure's value that day (NaN when unknown).
    """

    alert_id: int | str
    day: date
    rows: Sequence[DriverRow] = ()
    measure: str = ""
    other_days: int = 0
    other_sum: float = 0.0
    total: float = float("nan")

    def __post_init__(self) -> None:
        tuple_fields(self, "rows")


@dataclass(frozen=True)
class RunView:
    """One entry of the runs ledger.

    Attributes
    ----------
    id : int or str
        The run's id.
    kind : {"daily", "backfill"}
        Evening run or a backfill over past days.
    as_of : date
        Last business day the run covers.
    range_start : date or None
        First day of a backfill; None for a daily run.
    status : {"running", "done", "failed", "interrupted"}
        Written as a word.
    started : datetime
        When it started.
    finished : datetime or None
        When it ended; None while running (or when it never recorded its end).
    duration_seconds : float or None
        How long it took; None when unknown.
    counts : mapping of str to int
        What it did, e.g. {"closes": 500, "alerts opened": 3}, shown in the given order.
    error : str
        Error text of a failed run; "" otherwise.
    """

    id: int | str
    kind: RunKind
    as_of: date
    status: RunStatus
    started: datetime
    range_start: date | None = None
    finished: datetime | None = None
    duration_seconds: float | None = None
    counts: Mapping[str, int] = field(default_factory=dict)
    error: str = ""

    def __post_init__(self) -> None:
        check_word("kind", self.kind, RUN_KINDS)
        check_word("status", self.status, RUN_STATUSES)
        object.__setattr__(self, "counts", dict(self.counts))


@dataclass(frozen=True)
class DigestLink:
    """An archived evening digest.

    Attributes
    ----------
    as_of : date
        The digest's business day.
    path : str
        Where its digest.html sits, relative to the site's folder, with "/" separators
        (e.g. "digests/2026-03-05/digest.html"). The pipeline copies the archive there.
    subject : str
        Its subject line.
    status : str
        Its delivery status as the outbox records it (e.g. "sent", "failed").
    """

    as_of: date
    path: str
    subject: str = ""
    status: str = ""

    def __post_init__(self) -> None:
        check_relative_path("path", self.path)
