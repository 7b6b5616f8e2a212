"""What the evening digest shows: the context dataclasses and their checks.

The pipeline (through `monitor.digest.build`) fills these from plain data, never from the
store here; rendering reads them and nothing else. Each dataclass checks its own fields at
construction (array lengths, severities, the confidence level) and turns the sequences it
is given into tuples, so a context is immutable once built.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import TypeGuard

import numpy as np

from monitor._typing import CorrMatrix, Float1D, ReturnKind, Severity
from monitor.digest.feed import DataFeedView
from monitor.errors import ConfigError
from monitor.templating import tuple_fields

SEVERITY_RANK: dict[str, int] = {"critical": 0, "warning": 1, "info": 2}
"""Display order of severities, most severe first."""

MAX_DRIVERS = 5
"""Driver days shown per alert."""



def _float_array(instance: object, *names: str) -> None:
    for name in names:
        object.__setattr__(instance, name, np.asarray(getattr(instance, name), dtype=np.float64))


def _finite(value: float | None) -> TypeGuard[float]:
    # A type guard, so that callers may pass `value` on as a float once it is checked.
    return value is not None and math.isfinite(value)


@dataclass(frozen=True)
class Instrument:
    """An instrument as the digest names it.

    Attributes
    ----------
    symbol : str
        The desk's code, e.g. "KLV".
    name : str
        Full name, e.g. "Kelvara Industrial"; may hold any text, it is escaped in HTML.
    """

    symbol: str
    name: str = ""


@dataclass(frozen=True)
class DriverView:
    """One of the days that moved an alert's correlation most.

    Attributes
    ----------
    day : date
        The business day.
    contribution : float
        That day's share of the correlation value (same units as r; the pipeline's
        definition, typically the product of the two standardised returns divided by
        the window's observation count).
    return_a, return_b : float
        Returns of the pair's first and second instrument that day, as fractions
        (0.012 is 1.2 %). NaN is shown as "n/a".
    """

    day: date
    contribution: float
    return_a: float
    return_b: float


@dataclass(frozen=True, eq=False)
class AlertHistory:
    """An alert's measure over about the last year, for its chart.

    Attributes
    ----------
    dates : tuple of date, length T
        Business days, ascending.
    values, band_low, band_high : ndarray, shape (T,)
        Measure value and its confidence band per day; NaN where there were too few
        observations (drawn as a gap).
    """

    dates: Sequence[date]
    values: Float1D
    band_low: Float1D
    band_high: Float1D

    def __post_init__(self) -> None:
        tuple_fields(self, "dates")
        _float_array(self, "values", "band_low", "band_high")
        lengths = {len(self.dates), self.values.size, self.band_low.size, self.band_high.size}
        if len(lengths) != 1:
            raise ValueError(f"alert history arrays differ in length: {sorted(lengths)}")


@dataclass(frozen=True)
class AlertView:
    """One alert as the digest shows it.

    Attributes
    ----------
    id : int or str
        The alert's id in the store.
    severity : {"critical", "warning", "info"}
        Written out as a word beside the alert (never carried by colour alone).
    rule_name : str
        The desk's name for the rule, e.g. "utilities hedge".
    rule_kind : str
        What kind of condition it is, e.g. "level" or "shift".
    a, b : Instrument
        The pair.
    measure : str
        The measure's spec as configured, e.g. "rolling:63" or "ewma:hl=21".
    value : float
        The measure on the as-of date.
    band_low, band_high : float
        Confidence band around `value` at the digest's confidence level; NaN if unknown.
    level : float or None
        The level the rule compares with (a threshold), if the rule has one.
    clear_level : float or None
        Where the alert clears (a level with hysteresis), if the rule has one.
    direction : str
        "above" or "below" for level rules, "" when not applicable.
    strength : str
        Word for the size of `value` ("weak", "moderate", "strong", "very strong").
    p_value : float or None
        For shift rules: probability of a change at least this large with no real change.
    z : float or None
        For shift rules: the test statistic.
    baseline : float or None
        For shift rules: the value the current one is compared against (e.g. the long
        window's correlation).
    days_held : int
        Consecutive days the condition has held, including the as-of date.
    opened : date
        The alert's first day (marked on its chart).
    state : str
        "new", "continuing", "acknowledged" or "cleared".
    acknowledged_by, acknowledged_at, acknowledgement_note
        Who acknowledged it, when, and what they wrote; None when not acknowledged.
    cleared_on : date or None
        The day it cleared, for cleared alerts.
    drivers : tuple of DriverView
        Every date of the window with its contribution (they add up to the value of
        ``drivers_measure``); the digest shows the largest and the rest as one sum.
    drivers_measure : str
        The measure the drivers explain (``rolling:63``, ``rank:63``, ``ewma:hl=21``, ...).
        Days that moved the value most; the digest shows the five largest by |contribution|.
    history : AlertHistory or None
        The measure's recent history for the chart; None draws no chart.
    observations : float or None
        Observation count n (or effective count for EWMA) behind `value`.
    reminder : bool
        True on the alert's reminder days (every `remind_every` business days while it is
        open and unacknowledged); shown as "reminder", the other days as plain "open".
    groups : tuple of str
        The desk's groups of the alert's instruments (one for a pair within a group, two
        for a pair across groups, the group itself for a group target); empty when none.
        Used by the flood summary's table by rule and group.
    method_note : str
        One sentence from the rule (`Rule.method_note`): which variance and which
        false-alarm setting stand behind the alert; "" for rules on the desk's own levels.
    page : str
        Site-relative address of the alert on the history pages ("pairs/...html#alert-7");
        with `DigestContext.pages_url` it makes the alert's link. "" when none.
    """

    id: int | str
    severity: Severity
    rule_name: str
    rule_kind: str
    a: Instrument
    b: Instrument
    measure: str
    value: float
    band_low: float
    band_high: float
    days_held: int
    opened: date
    state: str
    level: float | None = None
    clear_level: float | None = None
    direction: str = ""
    strength: str = ""
    p_value: float | None = None
    z: float | None = None
    baseline: float | None = None
    acknowledged_by: str | None = None
    acknowledged_at: datetime | None = None
    acknowledgement_note: str | None = None
    cleared_on: date | None = None
    drivers: Sequence[DriverView] = ()
    history: AlertHistory | None = None
    observations: float | None = None
    reminder: bool = False
    groups: Sequence[str] = ()
    method_note: str = ""
    drivers_measure: str = ""
    page: str = ""

    def __post_init__(self) -> None:
        if self.severity not in SEVERITY_RANK:
            raise ConfigError(
                f"severity: {self.severity!r} is not one of critical, warning, info"
            )
        tuple_fields(self, "drivers", "groups")

    @property
    def pair(self) -> str:
        """The pair as "A / B" by symbol; a group or instrument target (group-average and stale
        rules) leaves `b` empty and shows its own name."""
        if not self.b.symbol:
            return self.a.symbol
        return f"{self.a.symbol} / {self.b.symbol}"

    @property
    def names(self) -> str:
        """The instruments' names as "Name A / Name B", a side without a name by its
        symbol; "" when no side has a name (so nothing prints as empty brackets)."""
        sides = [self.a] if not self.b.symbol else [self.a, self.b]
        if not any(side.name.strip() for side in sides):
            return ""
        return " / ".join(side.name.strip() or side.symbol for side in sides)

    @property
    def top_drivers(self) -> tuple[DriverView, ...]:
        """At most `MAX_DRIVERS` driver days, largest |contribution| first."""
        ranked = sorted(
            self.drivers,
            key=lambda d: (-abs(d.contribution) if _finite(d.contribution) else math.inf, d.day),
        )
        return tuple(ranked[:MAX_DRIVERS])

    @property
    def other_drivers(self) -> tuple[int, float]:
        """The days beyond :attr:`top_drivers` and the sum of their contributions, so that
        the shown days plus this remainder add up to the value the drivers explain."""
        shown = {id(d) for d in self.top_drivers}
        rest = [d.contribution for d in self.drivers
                if id(d) not in shown and _finite(d.contribution)]
        return len(rest), float(math.fsum(rest))

    @property
    def drivers_total(self) -> float:
        """The sum of every day's contribution: the value of :attr:`drivers_measure`."""
        return float(math.fsum(d.contribution for d in self.drivers
                               if _finite(d.contribution)))

    @property
    def excess(self) -> float:
        """|value - level|, or NaN when the rule has no level or the value is unknown."""
        if self.level is None or not (_finite(self.level) and _finite(self.value)):
            return math.nan
        return abs(self.value - self.level)


@dataclass(frozen=True)
class MoverView:
    """A monitored pair whose correlation changed most over the mover horizon.

    Attributes
    ----------
    a, b : Instrument
        The pair.
    measure : str
        Measure spec, e.g. "rolling:63".
    value_now : float
        Value on the as-of date.
    value_before : float
        Value `DigestParameters.largest_changes_days` business days earlier; NaN if unknown.
    """

    a: Instrument
    b: Instrument
    measure: str
    value_now: float
    value_before: float

    @property
    def pair(self) -> str:
        """The pair as "A / B" by symbol."""
        return f"{self.a.symbol} / {self.b.symbol}"

    @property
    def change(self) -> float:
        """value_now - value_before; NaN if either is NaN."""
        return self.value_now - self.value_before


@dataclass(frozen=True, eq=False)
class GroupAverageView:
    """A group's average pairwise correlation, now and a month earlier.

    Attributes
    ----------
    group : str
        The group's name, e.g. "Utilities".
    average_now : float
        Mean correlation over the group's pairs with a value on the as-of date.
    average_before : float
        The same `DigestParameters.group_average_days` business days earlier; NaN if unknown.
    pairs_used : int
        Pairs that had a value on the as-of date (of n (n - 1) / 2).
    instruments : int
        Instruments in the group.
    history_dates : tuple of date, length T
        Days of the small history chart (may be empty: no chart).
    history_values : ndarray, shape (T,)
        Average per day; NaN leaves a gap.
    """

    group: str
    average_now: float
    average_before: float
    pairs_used: int
    instruments: int
    history_dates: Sequence[date] = ()
    history_values: Float1D = field(default_factory=lambda: np.zeros(0))

    def __post_init__(self) -> None:
        tuple_fields(self, "history_dates")
        _float_array(self, "history_values")
        if len(self.history_dates) != self.history_values.size:
            raise ValueError(
                f"group average {self.group!r}: {len(self.history_dates)} dates but "
                f"{self.history_values.size} values"
            )

    @property
    def change(self) -> float:
        """average_now - average_before; NaN if either is NaN."""
        return self.average_now - self.average_before


@dataclass(frozen=True)
class DataIssueView:
    """A data problem the reader should know about.

    Attributes
    ----------
    kind : str
        "stale" (no new close), "missing" (no close at all), "suspect" (a tick that looks
        wrong), "restated" (a close changed after it was first stored) or "retracted" (an
        alert announced earlier that a rerun on changed closes no longer produces; `symbol`
        is then the alert's target and `day` its opened day) or "calendar" (a monitored
        pair's window lost dates because one side had a close and the other had none;
        `symbol` is then the pair, "A/B").
    symbol : str
        The instrument.
    day : date or None
        The day concerned (last close for stale data).
    detail : str
        One line for a person, e.g. "close 41.20 restated to 14.20".
    """

    kind: str
    symbol: str
    day: date | None
    detail: str


@dataclass(frozen=True, eq=False)
class HeatmapView:
    """A group's current correlation matrix.

    Attributes
    ----------
    group : str
        The group's name.
    symbols : tuple of str, length N
        Instruments in the matrix's row order.
    matrix : ndarray, shape (N, N)
        Correlations on the as-of date; NaN where a pair has too few common days.
        A group of one instrument gets no heatmap, only a note.
    """

    group: str
    symbols: Sequence[str]
    matrix: CorrMatrix

    def __post_init__(self) -> None:
        tuple_fields(self, "symbols")
        _float_array(self, "matrix")
        n = len(self.symbols)
        if self.matrix.shape != (n, n):
            raise ValueError(
                f"heatmap {self.group!r}: matrix shape {self.matrix.shape} for {n} symbols"
            )


@dataclass(frozen=True, eq=False)
class CrossMatrixView:
    """The correlations across two groups that a ``between`` rule watches.

    Attributes
    ----------
    left, right : str
        The two groups, as the rule names them (rows, columns).
    rows, columns : tuple of str, lengths R and C
        Their instruments in the desk's order.
    matrix : ndarray, shape (R, C)
        Correlation of each row instrument with each column instrument on the as-of
        date; NaN where a pair has too few common days (or pairs an instrument with
        itself, when it sits in both groups).
    rules : tuple of str
        The rules that watch these pairs.
    """

    left: str
    right: str
    rows: Sequence[str]
    columns: Sequence[str]
    matrix: CorrMatrix
    rules: Sequence[str] = ()

    def __post_init__(self) -> None:
        tuple_fields(self, "rows", "columns", "rules")
        _float_array(self, "matrix")
        if self.matrix.shape != (len(self.rows), len(self.columns)):
            raise ValueError(
                f"cross matrix {self.left!r} x {self.right!r}: shape {self.matrix.shape} "
                f"for {len(self.rows)} x {len(self.columns)} symbols"
            )


@dataclass(frozen=True)
class DigestParameters:
    """How the numbers were made, printed in the footer.

    Attributes
    ----------
    measures : tuple of str
        Measure specs in use, e.g. ("rolling:63", "ewma:hl=21").
    observations : tuple of float
        Observation count (or effective count) per measure, same order; used to state how
        wide the noise band is.
    return_kind : {"log", "simple"}
        Kind of returns correlated.
    horizon_days : int
        Return horizon in business days (1 = daily returns).
    confidence_level : float
        Level of every confidence band, e.g. 0.95.
    largest_changes_days : int
        Horizon of the "largest changes" table.
    group_average_days : int
        How far back the group averages are compared (about a month: 21).
    """

    measures: Sequence[str]
    observations: Sequence[float]
    return_kind: ReturnKind
    horizon_days: int = 1
    confidence_level: float = 0.95
    largest_changes_days: int = 5
    group_average_days: int = 21

    def __post_init__(self) -> None:
        tuple_fields(self, "measures", "observations")
        if len(self.measures) != len(self.observations):
            raise ConfigError(
                f"observations: {len(self.observations)} counts for "
                f"{len(self.measures)} measures"
            )
        if not 0.0 < self.confidence_level < 1.0:
            raise ConfigError(
                f"confidence_level: {self.confidence_level!r} is not between 0 and 1"
            )


@dataclass(frozen=True)
class DigestContext:
    """Everything one evening's digest shows. The pipeline fills it; rendering reads it.

    Attributes
    ----------
    desk : str
        The desk's name, e.g. "Kelvara Rates & Hedges".
    as_of : date
        The business day the digest is for.
    data_through : date
        Last day with closes in the store (earlier than `as_of` when data is late).
    generated_at : datetime
        When the digest was made, passed in (rendering never reads the clock).
    data_attention : bool
        True when a data problem should be looked at before the alerts.
    attention_message : str
        One line saying what, e.g. "no new closes since 2026-03-03"; "" when none.
    new_alerts : tuple of AlertView
        Alerts opened on `as_of`; shown most severe first (see `alert_sort_key`).
    continuing : tuple of AlertView
        Alerts still open and not acknowledged: shown as reminders.
    acknowledged : tuple of AlertView
        Alerts still open but acknowledged: a compact list.
    cleared : tuple of AlertView
        Alerts that cleared on `as_of`.
    movers : tuple of MoverView
        Pairs whose value changed most over `parameters.largest_changes_days`, alert or not.
    group_averages : tuple of GroupAverageView
        One per group, in the desk's group order.
    data_quality : tuple of DataIssueView
        Stale or missing instruments, suspect ticks, restated closes.
    heatmaps : tuple of HeatmapView
        One per group.
    cross_matrices : tuple of CrossMatrixView
        One per pair of groups that a ``between`` rule watches, in the rules' order.
    parameters : DigestParameters
        Measures, observation counts, return kind, horizon, confidence level.
    version : str
        comove's version.
    data_feed : DataFeedView or None
        The Data feed block (data-feed and stale alerts, instruments without a close,
        refused files); None leaves it out.
    run_date : date or None
        The day the evening run was for, which heads the digest; later than `as_of` when
        that day brought no closes (the numbers are then of `as_of`). None: `as_of`.
    pages_url : str
        Address of the history pages' folder (ending in "/"), when the desk publishes
        them somewhere a reader can open; "" when unknown, and a summarised list then
        names the history pages' index by its path instead of linking it.
    """

    desk: str
    as_of: date
    data_through: date
    generated_at: datetime
    parameters: DigestParameters
    version: str
    data_attention: bool = False
    attention_message: str = ""
    new_alerts: Sequence[AlertView] = ()
    continuing: Sequence[AlertView] = ()
    acknowledged: Sequence[AlertView] = ()
    cleared: Sequence[AlertView] = ()
    movers: Sequence[MoverView] = ()
    group_averages: Sequence[GroupAverageView] = ()
    data_quality: Sequence[DataIssueView] = ()
    heatmaps: Sequence[HeatmapView] = ()
    pages_url: str = ""
    cross_matrices: Sequence[CrossMatrixView] = ()
    run_date: date | None = None
    data_feed: DataFeedView | None = None

    def __post_init__(self) -> None:
        tuple_fields(
            self, "new_alerts", "continuing", "acknowledged", "cleared", "movers",
            "group_averages", "data_quality", "heatmaps", "cross_matrices",
        )

    @property
    def run_day(self) -> date:
        """The day heading the digest: the run's date (`run_date`), else `as_of`."""
        return self.run_date or self.as_of

    @property
    def open_count(self) -> int:
        """Alerts open before today and still open: reminders plus acknowledged ones."""
        return len(self.continuing) + len(self.acknowledged)


__all__ = [
    "MAX_DRIVERS",
    "SEVERITY_RANK",
    "AlertHistory",
    "AlertView",
    "GroupAverageView",
    "CrossMatrixView",
    "DataIssueView",
    "DigestContext",
    "DigestParameters",
    "DriverView",
    "HeatmapView",
    "Instrument",
    "MoverView",
]
