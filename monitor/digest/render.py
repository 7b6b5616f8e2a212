"""The evening digest: what it shows, rendered to HTML, plain text, PNG charts and email.

This module owns the digest's context dataclasses (filled by the pipeline, never read from
the store here), the order in which alerts and movers are shown, the cautions printed in
the footer, the subject line, and the MIME structure of the email:

    multipart/mixed                   (only when files are attached)
      multipart/alternative
        text/plain                    the same facts as the HTML, for any mail reader
        multipart/related
          text/html                   tables and inline styles, images as cid:...
          image/png ...               inline, one per chart
      text/csv ...                    matrices of groups too large for an email table

Rendering is pure apart from matplotlib and Jinja: no clock (the times shown are passed
in), no store. `write_digest` is the only function that touches the disk.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from email.message import EmailMessage
from email.policy import SMTP
from email.utils import format_datetime
from pathlib import Path
from typing import Any, cast

import numpy as np

from monitor._typing import CorrMatrix, Float1D, ReturnKind, Severity
from monitor.digest import png_charts
from monitor.engine.bands import fisher_band
from monitor.errors import ConfigError
from monitor.templating import format_corr, format_date, make_environment

SEVERITY_RANK: dict[str, int] = {"critical": 0, "warning": 1, "info": 2}
"""Display order of severities, most severe first."""

MAX_DRIVERS = 5
"""Driver days shown per alert."""

MATRIX_TABLE_MAX = 12
"""Largest group whose full matrix is printed as a table; larger ones go to a CSV file."""

DATA_ISSUE_KINDS = ("stale", "missing", "suspect", "restated")
"""Known kinds of data issue, in display order; other words are shown after them."""


def _tupled(instance: object, *names: str) -> None:
    # Frozen dataclasses still hold whatever sequence they were given; a tuple makes the
    # context really immutable and lets the pipeline pass lists.
    for name in names:
        object.__setattr__(instance, name, tuple(getattr(instance, name)))


def _float_array(instance: object, *names: str) -> None:
    for name in names:
        object.__setattr__(instance, name, np.asarray(getattr(instance, name), dtype=np.float64))


def _finite(value: float | None) -> bool:
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
        _tupled(self, "dates")
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
        Days that moved the value most; the digest shows the five largest by |contribution|.
    history : AlertHistory or None
        The measure's recent history for the chart; None draws no chart.
    observations : float or None
        Observation count n (or effective count for EWMA) behind `value`.
    reminder : bool
        True on the alert's reminder days (every `remind_every` business days while it is
        open and unacknowledged); shown as "reminder", the other days as plain "open".
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

    def __post_init__(self) -> None:
        if self.severity not in SEVERITY_RANK:
            raise ConfigError(
                f"severity: {self.severity!r} is not one of critical, warning, info"
            )
        _tupled(self, "drivers")

    @property
    def pair(self) -> str:
        """The pair as "A / B" by symbol; a group or instrument target (basket and stale
        rules) leaves `b` empty and shows its own name."""
        if not self.b.symbol:
            return self.a.symbol
        return f"{self.a.symbol} / {self.b.symbol}"

    @property
    def top_drivers(self) -> tuple[DriverView, ...]:
        """At most `MAX_DRIVERS` driver days, largest |contribution| first."""
        ranked = sorted(
            self.drivers,
            key=lambda d: (-abs(d.contribution) if _finite(d.contribution) else math.inf, d.day),
        )
        return tuple(ranked[:MAX_DRIVERS])

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
        Value `DigestParameters.mover_days` business days earlier; NaN if unknown.
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
class BasketView:
    """A group's average pairwise correlation, now and a month earlier.

    Attributes
    ----------
    group : str
        The group's name, e.g. "Utilities".
    average_now : float
        Mean correlation over the group's pairs with a value on the as-of date.
    average_before : float
        The same `DigestParameters.basket_days` business days earlier; NaN if unknown.
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
        _tupled(self, "history_dates")
        _float_array(self, "history_values")
        if len(self.history_dates) != self.history_values.size:
            raise ValueError(
                f"basket {self.group!r}: {len(self.history_dates)} dates but "
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
        wrong) or "restated" (a close changed after it was first stored).
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
        _tupled(self, "symbols")
        _float_array(self, "matrix")
        n = len(self.symbols)
        if self.matrix.shape != (n, n):
            raise ValueError(
                f"heatmap {self.group!r}: matrix shape {self.matrix.shape} for {n} symbols"
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
    mover_days : int
        Horizon of the "largest changes" table.
    basket_days : int
        How far back the group averages are compared (about a month: 21).
    """

    measures: Sequence[str]
    observations: Sequence[float]
    return_kind: ReturnKind
    horizon_days: int = 1
    confidence_level: float = 0.95
    mover_days: int = 5
    basket_days: int = 21

    def __post_init__(self) -> None:
        _tupled(self, "measures", "observations")
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
        Pairs whose value changed most over `parameters.mover_days`, alert or not.
    baskets : tuple of BasketView
        One per group, in the desk's group order.
    data_quality : tuple of DataIssueView
        Stale or missing instruments, suspect ticks, restated closes.
    heatmaps : tuple of HeatmapView
        One per group.
    parameters : DigestParameters
        Measures, observation counts, return kind, horizon, confidence level.
    version : str
        comove's version.
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
    baskets: Sequence[BasketView] = ()
    data_quality: Sequence[DataIssueView] = ()
    heatmaps: Sequence[HeatmapView] = ()

    def __post_init__(self) -> None:
        _tupled(
            self, "new_alerts", "continuing", "acknowledged", "cleared", "movers",
            "baskets", "data_quality", "heatmaps",
        )

    @property
    def open_count(self) -> int:
        """Alerts open before today and still open: reminders plus acknowledged ones."""
        return len(self.continuing) + len(self.acknowledged)


@dataclass(frozen=True)
class DigestImage:
    """One chart of the digest.

    Attributes
    ----------
    filename : str
        File name beside digest.html (and the MIME part's file name).
    cid : str
        Content-ID without angle brackets; the email's HTML refers to it as ``cid:<cid>``.
    png : bytes
        The PNG file.
    width, height : int
        Display size in CSS pixels.
    alt : str
        Alternative text saying what the chart shows and its key numbers.
    """

    filename: str
    cid: str
    png: bytes
    width: int
    height: int
    alt: str


@dataclass(frozen=True)
class DigestAttachment:
    """A file sent with the digest (full matrices of large groups, as CSV)."""

    filename: str
    content_type: str
    data: bytes


@dataclass(frozen=True)
class RenderedDigest:
    """The digest in every form it is delivered in.

    Attributes
    ----------
    subject : str
        Single-line subject naming the desk, the date and the counts.
    html_for_files : str
        HTML whose images are the file names in `images` (to sit in one folder).
    html_for_email : str
        The same HTML with images as ``cid:`` references.
    text : str
        Plain-text alternative with the same facts.
    images : tuple of DigestImage
        Every chart, in the order they appear.
    attachments : tuple of DigestAttachment
        Further files (CSV matrices of groups larger than `MATRIX_TABLE_MAX`).
    as_of : date
        The digest's business day.
    """

    subject: str
    html_for_files: str
    html_for_email: str
    text: str
    images: tuple[DigestImage, ...]
    attachments: tuple[DigestAttachment, ...]
    as_of: date


@dataclass(frozen=True)
class DigestPaths:
    """Files written by `write_digest`."""

    html: Path
    text: Path
    eml: Path
    images: tuple[Path, ...]
    attachments: tuple[Path, ...]


def alert_sort_key(alert: AlertView) -> tuple[Any, ...]:
    """Sort key putting the most pressing alert first.

    Severity first (critical, warning, info); within a severity, shift alerts by
    ascending p-value, then level alerts by how far the value is past its level
    (largest first); ties by pair and id so the order is stable.
    """
    p = alert.p_value if _finite(alert.p_value) else math.inf
    excess = alert.excess
    return (
        SEVERITY_RANK[alert.severity],
        p,
        -excess if math.isfinite(excess) else math.inf,
        alert.a.symbol,
        alert.b.symbol,
        str(alert.id),
    )


def _mover_key(mover: MoverView) -> tuple[Any, ...]:
    change = mover.change
    return (-abs(change) if math.isfinite(change) else math.inf, mover.pair, mover.measure)


def _issue_key(issue: DataIssueView) -> tuple[Any, ...]:
    rank = DATA_ISSUE_KINDS.index(issue.kind) if issue.kind in DATA_ISSUE_KINDS else 99
    return (rank, issue.kind, issue.symbol, issue.day or date.min)


def noise_band(r: float, n: float, confidence: float) -> tuple[float, float]:
    """Fisher z confidence band of a correlation, for the footer's caution.

    Parameters
    ----------
    r : float
        Correlation in (-1, 1).
    n : float
        Observations (or effective observations); at most 3 gives (NaN, NaN).
    confidence : float
        Two-sided level, e.g. 0.95.

    Returns
    -------
    (low, high) : tuple of float
        tanh(atanh(r) -+ q / sqrt(n - 3)) with q the normal quantile.
    """
    low, high = fisher_band(np.array([r]), np.array([n]), confidence)
    return (float(low[0]), float(high[0]))


def cautions(parameters: DigestParameters) -> tuple[str, ...]:
    """The footer's cautions, shared word for word by the HTML and the text part."""
    percent = f"{100 * parameters.confidence_level:g} %"
    widths = []
    for measure, n in zip(parameters.measures, parameters.observations, strict=True):
        low, high = noise_band(0.0, n, parameters.confidence_level)
        if math.isfinite(high):
            widths.append(f"{measure} (about {n:.0f} observations): \u00b1{format_corr(high)}")
    band = (
        f" Around a true value of zero, the {percent} band is "
        + "; ".join(widths)
        + ". It is wider for fewer observations and narrower near \u00b11."
        if widths
        else ""
    )
    return (
        "comove is a monitoring aid: it points at pairs worth a look and decides nothing.",
        "Correlation estimates are noisy; read every value together with its band." + band,
        "Correlation tells how consistently two instruments moved in the same direction. "
        "It says nothing about why they moved, nor about how large the moves were.",
        "Nothing in this digest is investment advice or a recommendation to trade.",
        "Limits, hedges and any action are decided under the firm's own risk policy "
        "by its licensed professionals.",
    )


def _one_line(text: str) -> str:
    # A header value must never carry a line break (header injection).
    return " ".join(text.split())


def digest_subject(ctx: DigestContext) -> str:
    """Subject line, e.g. "Kelvara Rates: correlation digest 2026-03-05 — 2 new, ..."."""
    subject = (
        f"{ctx.desk}: correlation digest {format_date(ctx.as_of)} \u2014 "
        f"{len(ctx.new_alerts)} new, {ctx.open_count} still open, "
        f"{len(ctx.cleared)} cleared"
    )
    if ctx.data_attention:
        subject += " \u2014 check data first"
    return _one_line(subject)


def _slug(text: str) -> str:
    slug = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")
    return slug[:40] or "group"


def _alert_alt(alert: AlertView) -> str:
    parts = [
        f"Chart of {alert.measure} for {alert.pair} over "
        f"{len(alert.history.dates) if alert.history else 0} days:",
        f"value {format_corr(alert.value)},",
        f"band {format_corr(alert.band_low)} to {format_corr(alert.band_high)}",
    ]
    if _finite(alert.level):
        parts.append(f", level {format_corr(alert.level)}")
    if _finite(alert.clear_level):
        parts.append(f", clears at {format_corr(alert.clear_level)}")
    parts.append(f", alert since {format_date(alert.opened)}.")
    return " ".join(parts).replace(" ,", ",")


@dataclass(frozen=True)
class _MatrixTable:
    """A heatmap's matrix ordered as drawn, for the table beside it."""

    group: str
    symbols: tuple[str, ...]
    rows: tuple[tuple[str, tuple[float, ...]], ...]
    image_key: str | None
    csv_name: str | None
    note: str


def _matrix_csv(symbols: Sequence[str], matrix: np.ndarray) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["symbol", *symbols])
    for symbol, row in zip(symbols, matrix, strict=True):
        writer.writerow([symbol, *("" if not math.isfinite(v) else f"{v:.4f}" for v in row)])
    return buffer.getvalue().encode("utf-8")


def _build_charts(
    ctx: DigestContext, new_alerts: Sequence[AlertView]
) -> tuple[
    list[DigestImage], dict[str, DigestImage], list[_MatrixTable], list[DigestAttachment]
]:
    stamp = ctx.as_of.strftime("%Y%m%d")
    images: list[DigestImage] = []
    by_key: dict[str, DigestImage] = {}

    def add(key: str, stem: str, chart: png_charts.ChartImage, alt: str) -> None:
        image = DigestImage(
            filename=f"{stem}.png",
            cid=f"{stem}.{stamp}@comove",
            png=chart.png,
            width=chart.width,
            height=chart.height,
            alt=alt,
        )
        images.append(image)
        by_key[key] = image

    for index, alert in enumerate(new_alerts, start=1):
        if alert.history is None:
            continue
        chart = png_charts.alert_history_chart(
            alert.history.dates, alert.history.values,
            alert.history.band_low, alert.history.band_high,
            level=alert.level, clear_level=alert.clear_level, start=alert.opened,
            title=f"{alert.pair}  {alert.measure}",
        )
        add(f"alert-{index}", f"alert-{index:02d}", chart, _alert_alt(alert))

    for index, basket in enumerate(ctx.baskets, start=1):
        if not basket.history_dates:
            continue
        chart = png_charts.basket_history_chart(
            basket.history_dates, basket.history_values, title=f"{basket.group}: average"
        )
        add(
            f"basket-{index}", f"group-{index:02d}-{_slug(basket.group)}-average", chart,
            f"Average pairwise correlation of {basket.group} over "
            f"{len(basket.history_dates)} days: now {format_corr(basket.average_now)}, "
            f"{ctx.parameters.basket_days} days earlier {format_corr(basket.average_before)}.",
        )

    tables: list[_MatrixTable] = []
    attachments: list[DigestAttachment] = []
    for index, heatmap in enumerate(ctx.heatmaps, start=1):
        stem = f"group-{index:02d}-{_slug(heatmap.group)}"
        n = len(heatmap.symbols)
        if n < 2:
            tables.append(_MatrixTable(
                heatmap.group, tuple(heatmap.symbols), (), None, None,
                "One instrument only: no pairs to show."
                if n == 1
                else "No instruments: no pairs to show.",
            ))
            continue
        chart, ordered = png_charts.heatmap_chart(
            heatmap.symbols, heatmap.matrix, title=f"{heatmap.group}: correlation matrix"
        )
        position = {symbol: i for i, symbol in enumerate(heatmap.symbols)}
        order = [position[s] for s in ordered]
        matrix = heatmap.matrix[np.ix_(order, order)]
        key = f"heatmap-{index}"
        csv_name = None
        rows: tuple[tuple[str, tuple[float, ...]], ...] = ()
        if n <= MATRIX_TABLE_MAX:
            rows = tuple(
                (s, tuple(float(v) for v in row)) for s, row in zip(ordered, matrix, strict=True)
            )
            note = "Instruments ordered so that those moving together sit together."
        else:
            csv_name = f"{stem}-matrix.csv"
            attachments.append(DigestAttachment(csv_name, "text/csv", _matrix_csv(ordered, matrix)))
            note = (
                f"{n} instruments: the full matrix, in the order drawn, is in the "
                f"attached file {csv_name}."
            )
        add(
            key, f"{stem}-heatmap", chart,
            f"Heatmap of the correlation matrix of {heatmap.group}, {n} instruments "
            "ordered by clustering; the values are in the table or file beside it.",
        )
        tables.append(_MatrixTable(heatmap.group, ordered, rows, key, csv_name, note))

    return images, by_key, tables, attachments


def render_digest(ctx: DigestContext) -> RenderedDigest:
    """Render one evening's digest to HTML (two variants), plain text and PNG charts.

    Parameters
    ----------
    ctx : DigestContext
        What to show. Lists are re-ordered here: alerts most severe first
        (`alert_sort_key`), movers by largest |change| (unknown changes last), data
        issues by kind.

    Returns
    -------
    RenderedDigest
        Subject, HTML for files and for email, text, images and attachments.
    """
    new_alerts = sorted(ctx.new_alerts, key=alert_sort_key)
    images, by_key, tables, attachments = _build_charts(ctx, new_alerts)
    environment = make_environment()
    common: dict[str, Any] = {
        "ctx": ctx,
        "subject": digest_subject(ctx),
        "new_alerts": new_alerts,
        "continuing": sorted(ctx.continuing, key=alert_sort_key),
        "acknowledged": sorted(ctx.acknowledged, key=alert_sort_key),
        "cleared": sorted(ctx.cleared, key=alert_sort_key),
        "movers": sorted(ctx.movers, key=_mover_key),
        "data_quality": sorted(ctx.data_quality, key=_issue_key),
        "matrix_tables": tables,
        "images": by_key,
        "cautions": cautions(ctx.parameters),
        "chart_key": png_charts.ALERT_CHART_KEY,
    }
    html_template = environment.get_template("digest.html")
    html_files = html_template.render(common, image_src={k: v.filename for k, v in by_key.items()})
    html_email = html_template.render(
        common, image_src={k: f"cid:{v.cid}" for k, v in by_key.items()}
    )
    text = environment.get_template("digest.txt").render(common)
    return RenderedDigest(
        subject=common["subject"],
        html_for_files=html_files,
        html_for_email=html_email,
        text=text,
        images=tuple(images),
        attachments=tuple(attachments),
        as_of=ctx.as_of,
    )


def _mime_body(rendered: RenderedDigest) -> EmailMessage:
    message = EmailMessage(policy=SMTP)
    message["Subject"] = rendered.subject
    message.set_content(rendered.text, subtype="plain", charset="utf-8")
    message.add_alternative(rendered.html_for_email, subtype="html", charset="utf-8")
    html_part = cast(list[EmailMessage], message.get_payload())[1]
    for image in rendered.images:
        html_part.add_related(
            image.png, maintype="image", subtype="png", cid=f"<{image.cid}>",
            disposition="inline", filename=image.filename,
        )
    for attachment in rendered.attachments:
        maintype, subtype = attachment.content_type.split("/", 1)
        message.add_attachment(
            attachment.data, maintype=maintype, subtype=subtype, filename=attachment.filename
        )
    return message


def build_message(
    rendered: RenderedDigest,
    *,
    sender: str,
    recipients: Sequence[str],
    date: datetime,
    message_id_domain: str = "localhost",
) -> EmailMessage:
    """Build the digest email (standard library `EmailMessage`, policy SMTP).

    Parameters
    ----------
    rendered : RenderedDigest
        Output of `render_digest`.
    sender : str
        From address.
    recipients : sequence of str
        To addresses; at least one.
    date : datetime
        Value of the Date header; must carry a time zone. Passed in so that building a
        message never reads the clock.
    message_id_domain : str
        Right-hand side of the Message-ID. The left side is derived from the content, so
        a digest re-sent after a failure keeps its Message-ID and readers' mail systems
        can drop the duplicate.

    Returns
    -------
    EmailMessage
        multipart/alternative (text/plain first, then multipart/related with the HTML and
        its inline PNGs), wrapped in multipart/mixed when CSV files are attached.

    Raises
    ------
    ConfigError
        Empty or multi-line sender or recipients, or a naive `date`.
    """
    addresses = [sender, *recipients]
    if not recipients:
        raise ConfigError("recipients: no address given")
    for address in addresses:
        if not address.strip() or "\n" in address or "\r" in address:
            raise ConfigError(f"recipients: {address!r} is not a single-line address")
    if date.tzinfo is None or date.utcoffset() is None:
        raise ConfigError(f"date: {date.isoformat()} has no time zone")
    message = _mime_body(rendered)
    digest = hashlib.sha256()
    for part in (rendered.subject, rendered.text, rendered.html_for_email):
        digest.update(part.encode("utf-8"))
    message["From"] = sender
    message["To"] = ", ".join(recipients)
    message["Date"] = format_datetime(date)
    message["Message-ID"] = (
        f"<comove-digest-{rendered.as_of.isoformat()}-{digest.hexdigest()[:24]}"
        f"@{message_id_domain}>"
    )
    return message


def write_digest(
    rendered: RenderedDigest, out_dir: Path | str, *, message: EmailMessage | None = None
) -> DigestPaths:
    """Write the digest to a folder: digest.html with its PNGs beside it, digest.txt,
    digest.eml and any attached files.

    Parameters
    ----------
    rendered : RenderedDigest
        Output of `render_digest`.
    out_dir : Path or str
        Folder, created if missing; existing files of the same names are replaced.
    message : EmailMessage, optional
        The message to save as digest.eml; by default the MIME body alone (subject, no
        addresses), enough to preview in a mail reader.

    Returns
    -------
    DigestPaths
        Paths of every file written.
    """
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    html_path = folder / "digest.html"
    html_path.write_text(rendered.html_for_files, encoding="utf-8")
    text_path = folder / "digest.txt"
    text_path.write_text(rendered.text, encoding="utf-8")
    image_paths = []
    for image in rendered.images:
        path = folder / image.filename
        path.write_bytes(image.png)
        image_paths.append(path)
    attachment_paths = []
    for attachment in rendered.attachments:
        path = folder / attachment.filename
        path.write_bytes(attachment.data)
        attachment_paths.append(path)
    eml_path = folder / "digest.eml"
    eml_path.write_bytes((message or _mime_body(rendered)).as_bytes())
    return DigestPaths(
        html=html_path, text=text_path, eml=eml_path,
        images=tuple(image_paths), attachments=tuple(attachment_paths),
    )


__all__ = [
    "AlertHistory",
    "AlertView",
    "BasketView",
    "DataIssueView",
    "DigestAttachment",
    "DigestContext",
    "DigestImage",
    "DigestParameters",
    "DigestPaths",
    "DriverView",
    "HeatmapView",
    "Instrument",
    "MoverView",
    "RenderedDigest",
    "alert_sort_key",
    "build_message",
    "cautions",
    "digest_subject",
    "noise_band",
    "render_digest",
    "write_digest",
]
