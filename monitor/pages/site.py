"""The alert history site: what its pages show, where each file goes, and how it is written.

This module owns the context dataclasses the pipeline fills for the history pages (never
read from the store here), the site's layout on disk, the file names derived from desk
data (`safe_name`), the cautions printed on every page, and the rebuild of a folder so a
reader never sees a half-written page.

Layout of a built site (all links are relative, so it works opened straight from disk)::

    index.html                every alert; filter and sort with site.js
    rules.html                the configured rules
    rules/<name>.html         one rule: its parameters and its alerts
    pairs/<name>.html         one pair: measure histories, alert periods, events,
    pairs/<name>-<k>.svg      acknowledgements and drivers; chart k of the page
    targets/<name>.html       a group (basket rules) or one instrument (stale-data rules)
    runs.html                 the runs ledger
    digests.html              links to archived digests (copied there by the pipeline)
    site.js  site.css  favicon.svg

Decisions a reader of the code should know:

- Basket and stale-data alerts get a *target page* of their own (`TargetPage`), laid out
  like a pair page without drivers, rather than only a link to their rule: a reviewer asks
  "what happened to this group" as often as "what did this rule do".
- Every alert links to a page that exists: an alert whose pair, target or rule has no page
  in the context gets a short page built from the alert alone, saying so.
- A rule page lists the alerts of `SiteContext.alerts` with that rule name: the alerts are
  given once and every page that shows them is derived from that one list.
- A pair is identified regardless of order: ("KLV", "DUNQ") and ("DUNQ", "KLV") share one
  page, shown in the order the `PairPage` gives.
- Rebuilding removes only files that the previous build wrote (listed in `MANIFEST_NAME`),
  never anything else in the folder, such as the digest archive.

Rendering is pure apart from Jinja and matplotlib (`render_site`); `build_site` is the only
function that touches the disk. Times shown are passed in; the clock is never read.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import tempfile
import unicodedata
from collections import defaultdict
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path, PurePosixPath
from typing import Any, Literal

import jinja2
import numpy as np

from monitor._typing import Float1D, ReturnKind, Severity
from monitor.errors import ComoveError
from monitor.pages import svg_charts
from monitor.templating import format_corr, format_date, make_environment, templates_dir

AlertState = Literal["open", "cleared", "withdrawn"]
TargetKind = Literal["pair", "group", "instrument"]
EventKind = Literal["opened", "continuing", "cleared"]
RunKind = Literal["daily", "backfill"]
RunStatus = Literal["running", "done", "failed", "interrupted"]

ALERT_STATES: tuple[str, ...] = ("open", "cleared", "withdrawn")
SEVERITIES: tuple[str, ...] = ("critical", "warning", "info")
TARGET_KINDS: tuple[str, ...] = ("pair", "group", "instrument")
EVENT_KINDS: tuple[str, ...] = ("opened", "continuing", "cleared")
RUN_KINDS: tuple[str, ...] = ("daily", "backfill")
RUN_STATUSES: tuple[str, ...] = ("running", "done", "failed", "interrupted")

SITE_ASSETS: tuple[str, ...] = ("site.js", "site.css", "favicon.svg")
"""Files copied unchanged from ``templates/pages/`` into the site's top folder."""

MANIFEST_NAME = ".comove-pages.json"
"""List of the files the last build wrote; a rebuild removes those it no longer writes."""

DIGEST_ARCHIVE_DIR = "digests"
"""Folder of the site where the pipeline is expected to copy archived digests.

`monitor.pages.serve` relaxes its style policy there only, because digests are email HTML with
inline styles.
"""

SLUG_LENGTH = 40
"""Longest readable part of a `safe_name`."""
HASH_LENGTH = 12
"""Hex digits of SHA-256 in a `safe_name` (48 bits)."""

MONTH_END_ROWS = 400
"""Most month-end rows printed under a chart (more than 33 years of history)."""


def _check_word(field_name: str, value: str, allowed: Sequence[str]) -> None:
    if value not in allowed:
        raise ComoveError(f"{field_name}: {value!r} is not one of {', '.join(allowed)}")


def _tupled(instance: object, *names: str) -> None:
    # Frozen dataclasses keep whatever sequence they were given; tuples make the context
    # really immutable and let the pipeline pass lists.
    for name in names:
        object.__setattr__(instance, name, tuple(getattr(instance, name)))


# --- context -------------------------------------------------------------------------


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
        _tupled(self, "measures")
        _check_word("return_kind", self.return_kind, ("log", "simple"))
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
    state : {"open", "cleared", "withdrawn"}
        "withdrawn": a rerun over the same days no longer produces the alert.
    severity : {"critical", "warning", "info"}
        Written out as a word wherever it is shown.
    rule_name, rule_kind : str
        The desk's name of the rule (e.g. "utilities hedge") and its kind (e.g. "level").
    target_kind : {"pair", "group", "instrument"}
        What the rule watches: a pair, a group (basket rules) or one instrument (stale data).
    target : tuple of str
        The two symbols of a pair, else the one group name or symbol.
    opened : date
        The alert's first day.
    cleared : date or None
        The day it cleared; None while open or when withdrawn.
    peak : float
        Most extreme value of the measure while the alert was open; NaN when unknown.
    acknowledged_by : str or None
        Who acknowledged it, None when nobody has.
    groups : tuple of str
        Groups the target belongs to, for the group filter; empty means "derive them from
        `SiteContext.groups`".
    measure : str
        The measure spec the rule watches, "" when the rule has none.

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

    def __post_init__(self) -> None:
        _tupled(self, "target", "groups")
        _check_word("state", self.state, ALERT_STATES)
        _check_word("severity", self.severity, SEVERITIES)
        _check_word("target_kind", self.target_kind, TARGET_KINDS)
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
        _tupled(self, "dates", "levels")
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
        _check_word("severity", self.severity, SEVERITIES)


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
    kind : {"opened", "continuing", "cleared"}
        What happened; "continuing" is a reminder that the alert is still open.
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

    def __post_init__(self) -> None:
        _check_word("kind", self.kind, EVENT_KINDS)


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
    """

    alert_id: int | str
    day: date
    rows: Sequence[DriverRow] = ()

    def __post_init__(self) -> None:
        _tupled(self, "rows")


@dataclass(frozen=True)
class PairPage:
    """Everything the page of one monitored pair shows.

    Attributes
    ----------
    a, b : InstrumentView
        The pair, in the order its returns are given in the drivers.
    measures : tuple of MeasureHistory
        One chart and one table of key numbers each.
    spans : tuple of AlertSpan
        Alert periods to shade.
    events : tuple of EventView
        Every event of the pair's alerts (shown by date).
    acknowledgements : tuple of AckView
        Acknowledgements and notes.
    drivers : tuple of DriversView
        Driver days, one entry per alert.
    """

    a: InstrumentView
    b: InstrumentView
    measures: Sequence[MeasureHistory] = ()
    spans: Sequence[AlertSpan] = ()
    events: Sequence[EventView] = ()
    acknowledgements: Sequence[AckView] = ()
    drivers: Sequence[DriversView] = ()

    def __post_init__(self) -> None:
        _tupled(self, "measures", "spans", "events", "acknowledgements", "drivers")

    @property
    def label(self) -> str:
        """"KLV/DUNQ"."""
        return f"{self.a.symbol}/{self.b.symbol}"


@dataclass(frozen=True)
class TargetPage:
    """The page of a group (basket rules) or of one instrument (stale-data rules).

    Attributes
    ----------
    kind : {"group", "instrument"}
        What the target is.
    label : str
        The group's name or the instrument's symbol, as in `AlertSummary.target`.
    name : str
        A longer name (the instrument's name, a group's description); "" when none.
    members : tuple of str
        Symbols of a group's instruments; empty for an instrument.
    measures : tuple of MeasureHistory
        Histories to chart (e.g. the group's average correlation); may be empty.
    spans, events, acknowledgements
        As for `PairPage`.
    """

    kind: Literal["group", "instrument"]
    label: str
    name: str = ""
    members: Sequence[str] = ()
    measures: Sequence[MeasureHistory] = ()
    spans: Sequence[AlertSpan] = ()
    events: Sequence[EventView] = ()
    acknowledgements: Sequence[AckView] = ()

    def __post_init__(self) -> None:
        _tupled(self, "members", "measures", "spans", "events", "acknowledgements")
        _check_word("kind", self.kind, ("group", "instrument"))


@dataclass(frozen=True)
class RulePage:
    """One configured rule.

    Attributes
    ----------
    name : str
        The desk's name for it.
    kind : str
        Its kind ("level", "shift", "basket", "stale", ...).
    severity : {"critical", "warning", "info"}
        Severity of its alerts.
    measure : str
        Measure spec it watches; "" when none (stale-data rules).
    parameters : tuple of (str, str)
        Its settings as configured, as (key, value) text, in the order to show them.
    description : str
        A line of the desk's own words about it; "" when none.

    Notes
    -----
    Its alerts are those of `SiteContext.alerts` with this rule name.
    """

    name: str
    kind: str
    severity: Severity
    measure: str = ""
    parameters: Sequence[tuple[str, str]] = ()
    description: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "parameters", tuple((str(k), str(v)) for k, v in self.parameters)
        )
        _check_word("severity", self.severity, SEVERITIES)


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
        _check_word("kind", self.kind, RUN_KINDS)
        _check_word("status", self.status, RUN_STATUSES)
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


@dataclass(frozen=True)
class SiteContext:
    """Everything the history site shows. The pipeline fills it; rendering reads it.

    Attributes
    ----------
    desk : str
        The desk's name, in every page's header.
    generated_at : datetime
        When the site was built, passed in (rendering never reads the clock).
    data_through : date
        Last day with closes in the store.
    version : str
        comove's version.
    parameters : SiteParameters
        Measures, return kind and confidence level, in every footer.
    alerts : tuple of AlertSummary
        Every alert, the one source of every alert table.
    pairs : tuple of PairPage
        One page each; a pair may appear once.
    rules : tuple of RulePage
        The configured rules.
    runs : tuple of RunView
        The runs ledger.
    digests : tuple of DigestLink
        Archived digests.
    groups : mapping of str to str
        Symbol -> group, used for the group filter and to fill `AlertSummary.groups`.
    targets : tuple of TargetPage
        Pages of groups and single instruments watched by basket and stale-data rules.
    """

    desk: str
    generated_at: datetime
    data_through: date
    version: str
    parameters: SiteParameters
    alerts: Sequence[AlertSummary] = ()
    pairs: Sequence[PairPage] = ()
    rules: Sequence[RulePage] = ()
    runs: Sequence[RunView] = ()
    digests: Sequence[DigestLink] = ()
    groups: Mapping[str, str] = field(default_factory=dict)
    targets: Sequence[TargetPage] = ()

    def __post_init__(self) -> None:
        _tupled(self, "alerts", "pairs", "rules", "runs", "digests", "targets")
        object.__setattr__(self, "groups", dict(self.groups))


@dataclass(frozen=True)
class BuildReport:
    """What `build_site` did.

    Attributes
    ----------
    written : int
        Files written because they were new or their content changed.
    unchanged : int
        Files left alone because their content was already the same.
    removed : int
        Files of the previous build that this build no longer has (stale pages).
    charts_drawn : int
        Charts drawn by this build (the others were unchanged since the last one).
    files : tuple of str
        Every file of the site, relative paths with "/", sorted.
    missing_digests : tuple of str
        Digest paths linked from digests.html that did not exist at build time.
    """

    written: int
    unchanged: int
    removed: int
    charts_drawn: int
    files: tuple[str, ...]
    missing_digests: tuple[str, ...] = ()


# --- names ---------------------------------------------------------------------------


# Latin letters that Unicode does not decompose into a base letter and an accent, so NFKD
# alone would drop them from the readable part ("Ærø" would become "r").
_LETTERS_WITHOUT_DECOMPOSITION = str.maketrans({
    "Æ": "AE", "æ": "ae", "Ø": "O", "ø": "o", "Œ": "OE", "œ": "oe", "ß": "ss", "Đ": "D",
    "đ": "d", "Ł": "L", "ł": "l", "Þ": "Th", "þ": "th", "Ð": "D", "ð": "d", "ı": "i",
})


def safe_name(text: str) -> str:
    """Turn any text (a symbol, a rule name) into a file name that is safe everywhere.

    Parameters
    ----------
    text : str
        Any string, including "/", "..", spaces, backslashes, NUL, non-ASCII letters or
        thousands of characters.

    Returns
    -------
    str
        ``<slug>-<hash>``: the slug is at most `SLUG_LENGTH` lower-case ASCII letters,
        digits and "-" (accents dropped, "Æ" spelled "ae", other runs of characters become
        one "-"; "x" when nothing is left), starting with a letter or digit; the hash is the first
        `HASH_LENGTH` hex digits of SHA-256 of the exact text. So the name never holds a
        separator, a dot or a capital, two texts differing only in case or punctuation
        still get different names (also on case-insensitive file systems), and the same
        text gives the same name on every machine and run.
    """
    spelled = text.translate(_LETTERS_WITHOUT_DECOMPOSITION)
    folded = unicodedata.normalize("NFKD", spelled).encode("ascii", "ignore").decode("ascii")
    slug = re.sub(r"[^a-z0-9]+", "-", folded.lower()).strip("-")[:SLUG_LENGTH].strip("-")
    digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:HASH_LENGTH]
    return f"{slug or 'x'}-{digest}"


def _pair_key(a: str, b: str) -> tuple[str, str]:
    first, second = sorted((a, b))
    return (first, second)


def pair_page_path(a: str, b: str) -> str:
    """Site-relative path of the page of pair (a, b); the same for (b, a).

    JSON of the sorted pair is what is named, so no choice of separator can make two
    different pairs share a page (a symbol may itself hold "/").
    """
    return f"pairs/{safe_name(json.dumps(_pair_key(a, b)))}.html"


def target_page_path(kind: str, label: str) -> str:
    """Site-relative path of the page of a group or instrument target."""
    return f"targets/{safe_name(json.dumps([kind, label]))}.html"


def rule_page_path(name: str) -> str:
    """Site-relative path of the page of the rule called `name`."""
    return f"rules/{safe_name(name)}.html"


def check_relative_path(field_name: str, path: str) -> str:
    """Check that `path` is a plain relative path inside the site and return it.

    Raises
    ------
    ComoveError
        Empty, absolute, with a drive, a backslash, a NUL, a scheme, or a ".." part.
    """
    parts = PurePosixPath(path).parts
    bad = (
        not path
        or path.startswith("/")
        or "\\" in path
        or "\x00" in path
        or ":" in path
        or any(part in ("..", ".") for part in path.split("/"))
        or not parts
    )
    if bad:
        raise ComoveError(f"{field_name}: {path!r} is not a relative path inside the site")
    return path


def _anchor(alert_id: int | str) -> str:
    if isinstance(alert_id, int) and not isinstance(alert_id, bool):
        return f"alert-{alert_id}"
    return f"alert-{safe_name(str(alert_id))}"


# --- words and numbers ---------------------------------------------------------------


def cautions(parameters: SiteParameters) -> tuple[str, ...]:
    """The cautions printed at the foot of every page, in the order shown."""
    percent = f"{100 * parameters.confidence_level:g} %"
    return (
        "comove is a monitoring aid: it points at pairs that may deserve a closer look "
        "and decides nothing.",
        "Every correlation here is an estimate from a limited number of days and is "
        f"noisy. Read each value together with its {percent} band; a band that is wide "
        "means the value says little.",
        "Correlation describes how consistently two instruments moved in the same "
        "direction. It does not say why they moved, nor how large the moves were.",
        "Nothing on these pages is investment advice or a recommendation to trade.",
        "Limits, hedges and any action are decided under the firm's own risk policy by "
        "its licensed professionals.",
    )


EVENT_WORDS: dict[str, str] = {
    "opened": "opened",
    "continuing": "still open (reminder)",
    "cleared": "cleared",
}
"""How each event kind is written in the event tables."""


def format_duration(seconds: float | None) -> str:
    """Format a duration: "0.4 s", "42.0 s", "3 min 05 s", "2 h 07 min"; None -> "n/a"."""
    if seconds is None or not math.isfinite(seconds) or seconds < 0:
        return "n/a"
    if seconds < 60:
        return f"{seconds:.1f} s"
    whole = round(seconds)
    if whole < 3600:
        return f"{whole // 60} min {whole % 60:02d} s"
    return f"{whole // 3600} h {whole % 3600 // 60:02d} min"


def format_count(value: float | None) -> str:
    """Format an observation count: whole numbers plain ("63"), effective ones "32.3"."""
    if value is None or not math.isfinite(value):
        return "n/a"
    if float(value).is_integer():
        return f"{int(value)}"
    return f"{value:.1f}"


def _sort_number(value: float | None) -> str:
    # Empty sort keys go last whatever the direction (site.js); repr keeps full precision.
    if value is None or not math.isfinite(value):
        return ""
    return repr(float(value))


def _environment() -> jinja2.Environment:
    environment = make_environment()
    environment.filters["duration"] = format_duration
    environment.filters["count"] = format_count
    environment.filters["sortnum"] = _sort_number
    environment.filters["anchor"] = _anchor
    return environment


# --- derived views -------------------------------------------------------------------


@dataclass(frozen=True)
class _AlertRow:
    """An alert with what the tables need beside it: its link, groups and search text."""

    alert: AlertSummary
    link: str
    groups: tuple[str, ...]
    search: str
    groups_json: str


@dataclass(frozen=True)
class _MeasureBlock:
    """One chart of a page and its table of key numbers."""

    history: MeasureHistory
    chart_file: str
    width: int
    height: int
    alt: str
    days_with_value: int
    latest: tuple[date, float, float, float] | None
    lowest: tuple[date, float] | None
    highest: tuple[date, float] | None
    month_ends: tuple[tuple[date, float, float, float], ...]
    spans: tuple[AlertSpan, ...]


@dataclass(frozen=True)
class _HistoryPage:
    """A pair or target page, ready to render."""

    path: str
    kind: str
    title: str
    heading: str
    instruments: tuple[InstrumentView, ...]
    members: tuple[str, ...]
    note: str
    blocks: tuple[_MeasureBlock, ...]
    alerts: tuple[_AlertRow, ...]
    spans: tuple[AlertSpan, ...]
    events: tuple[EventView, ...]
    acknowledgements: tuple[AckView, ...]
    drivers: tuple[DriversView, ...]
    symbols: tuple[str, str] | None
    alert_ids: frozenset[str]


def _id_key(alert_id: int | str) -> tuple[int, int, str]:
    if isinstance(alert_id, int):
        return (0, alert_id, "")
    return (1, 0, str(alert_id))


def _alert_order(alert: AlertSummary) -> tuple[Any, ...]:
    # Newest first; within a day most severe first, then by id for a stable order.
    return (-alert.opened.toordinal(), SEVERITIES.index(alert.severity), _id_key(alert.id))


def _measure_block(
    history: MeasureHistory, spans: Sequence[AlertSpan], chart_file: str, subject: str,
    confidence_level: float,
) -> tuple[_MeasureBlock, svg_charts.HistoryChartRequest]:
    mine = tuple(s for s in spans if s.measure in ("", history.measure))
    request = svg_charts.HistoryChartRequest.build(
        history.dates, history.values, history.band_low, history.band_high,
        spans=[svg_charts.ChartSpan(s.start, s.end) for s in mine],
        levels=history.levels, title=f"{subject}  {history.measure}",
    )
    values = history.values
    known = np.flatnonzero(np.isfinite(values))
    latest = lowest = highest = None
    if known.size:
        last = int(known[-1])
        latest = (history.dates[last], float(values[last]),
                  float(history.band_low[last]), float(history.band_high[last]))
        low_i = int(known[np.argmin(values[known])])
        high_i = int(known[np.argmax(values[known])])
        lowest = (history.dates[low_i], float(values[low_i]))
        highest = (history.dates[high_i], float(values[high_i]))
    month_ends: list[tuple[date, float, float, float]] = []
    for i, day in enumerate(history.dates):
        is_last = i + 1 == len(history.dates)
        if is_last or history.dates[i + 1].month != day.month:
            month_ends.append((day, float(values[i]), float(history.band_low[i]),
                               float(history.band_high[i])))
    month_ends = month_ends[-MONTH_END_ROWS:]
    percent = f"{100 * confidence_level:g} %"
    if latest is not None:
        summary = (
            f"latest value {format_corr(latest[1])} on {format_date(latest[0])} "
            f"({percent} band {format_corr(latest[2])} to {format_corr(latest[3])})"
        )
    else:
        summary = "no day with a value"
    period = (
        f"from {format_date(history.dates[0])} to {format_date(history.dates[-1])}"
        if history.dates else "with no days"
    )
    alt = (
        f"Chart of {history.measure} for {subject} {period}: {summary}; "
        f"{len(mine)} alert period{'s' if len(mine) != 1 else ''} shaded. "
        "The key numbers are in the table below the chart."
    )
    block = _MeasureBlock(
        history=history, chart_file=chart_file, width=svg_charts.CHART_WIDTH,
        height=svg_charts.CHART_HEIGHT, alt=alt, days_with_value=int(known.size),
        latest=latest, lowest=lowest, highest=highest, month_ends=tuple(month_ends),
        spans=mine,
    )
    return block, request


def _event_order(event: EventView) -> tuple[Any, ...]:
    return (event.day, _id_key(event.alert_id), EVENT_KINDS.index(event.kind))


class _SiteRenderer:
    """Turns one `SiteContext` into the site's files (path -> bytes)."""

    def __init__(self, ctx: SiteContext) -> None:
        self.ctx = ctx
        self.environment = _environment()
        self.files: dict[str, bytes] = {}
        self.charts: dict[str, svg_charts.HistoryChartRequest] = {}
        self.owners: dict[str, str] = {}
        self.names: dict[str, str] = {}
        for page in ctx.pairs:
            for item in (page.a, page.b):
                if item.name:
                    self.names.setdefault(item.symbol, item.name)
        for target in ctx.targets:
            if target.name:
                self.names.setdefault(target.label, target.name)
        self.rows = [self._alert_row(a) for a in sorted(ctx.alerts, key=_alert_order)]
        self.group_names = sorted(
            (set(ctx.groups.values()) | {g for row in self.rows for g in row.groups}) - {""}
        )

    # Each path may come from one thing only; a clash would mean two pages share a file.
    def _claim(self, path: str, owner: str) -> None:
        previous = self.owners.setdefault(path, owner)
        if previous != owner:
            raise ComoveError(f"pages: {owner} and {previous} would both be written to {path}")

    def _add(self, path: str, owner: str, data: bytes) -> None:
        self._claim(path, owner)
        self.files[path] = data

    def _alert_link(self, alert: AlertSummary) -> str:
        if alert.target_kind == "pair":
            return pair_page_path(alert.target[0], alert.target[1])
        return target_page_path(alert.target_kind, alert.target[0])

    def _alert_groups(self, alert: AlertSummary) -> tuple[str, ...]:
        if alert.groups:
            return tuple(alert.groups)
        if alert.target_kind == "group":
            return (alert.target[0],)
        found = [self.ctx.groups.get(symbol, "") for symbol in alert.target]
        return tuple(dict.fromkeys(g for g in found if g))

    def _alert_row(self, alert: AlertSummary) -> _AlertRow:
        groups = self._alert_groups(alert)
        words = [
            str(alert.id), alert.state, alert.severity, alert.rule_name, alert.rule_kind,
            alert.target_label, *alert.target, *groups, alert.measure,
            # A pair is the same pair written either way round.
            "/".join(reversed(alert.target)) if alert.target_kind == "pair" else "",
            alert.acknowledged_by or "",
            *(self.names.get(item, "") for item in alert.target),
        ]
        return _AlertRow(
            alert=alert, link=self._alert_link(alert), groups=groups,
            search=" ".join(w for w in words if w).lower(),
            groups_json=json.dumps(list(groups)),
        )

    def render(self, name: str, root: str, current: str, **values: Any) -> bytes:
        template = self.environment.get_template(f"pages/{name}")
        text = template.render(
            ctx=self.ctx, root=root, current=current, cautions=cautions(self.ctx.parameters),
            severities=SEVERITIES, states=ALERT_STATES, event_words=EVENT_WORDS,
            chart_key=svg_charts.HISTORY_CHART_KEY, rule_path=rule_page_path, **values,
        )
        return text.encode("utf-8")

    def build(self) -> tuple[dict[str, bytes], dict[str, svg_charts.HistoryChartRequest]]:
        """Render every page; charts are returned as requests, drawn by the caller."""
        ctx = self.ctx
        pages_dir = templates_dir() / "pages"
        for asset in SITE_ASSETS:
            self._add(asset, f"asset {asset}", (pages_dir / asset).read_bytes())
        self._add("index.html", "index", self.render(
            "index.html", "", "alerts", rows=self.rows, group_names=self.group_names,
            rule_names=sorted({row.alert.rule_name for row in self.rows}),
        ))
        self._rule_pages()
        self._history_pages()
        runs = sorted(ctx.runs, key=lambda r: (r.started, _id_key(r.id)), reverse=True)
        self._add("runs.html", "runs", self.render("runs.html", "", "runs", runs=runs))
        digests = sorted(ctx.digests, key=lambda d: (d.as_of, d.path), reverse=True)
        self._add("digests.html", "digests",
                  self.render("digests.html", "", "digests", digests=digests))
        return self.files, self.charts

    def _rule_pages(self) -> None:
        by_rule: dict[str, list[_AlertRow]] = defaultdict(list)
        for row in self.rows:
            by_rule[row.alert.rule_name].append(row)
        rules = list(self.ctx.rules)
        seen: set[str] = set()
        for rule in rules:
            if rule.name in seen:
                raise ComoveError(f"rules: {rule.name!r} appears twice")
            seen.add(rule.name)
        # Alerts of a rule no longer configured still need a page to link to.
        retired = [
            RulePage(name=name, kind=rows[0].alert.rule_kind, severity=rows[0].alert.severity,
                     measure=rows[0].alert.measure)
            for name, rows in sorted(by_rule.items()) if name not in seen
        ]
        entries = [(rule, True) for rule in rules] + [(rule, False) for rule in retired]
        self._add("rules.html", "rules", self.render(
            "rules.html", "", "rules",
            entries=[(rule, known, by_rule.get(rule.name, [])) for rule, known in entries],
        ))
        for rule, configured in entries:
            self._add(rule_page_path(rule.name), f"rule {rule.name!r}", self.render(
                "rule.html", "../", "rules", rule=rule, configured=configured,
                rows=by_rule.get(rule.name, []),
            ))

    def _history_pages(self) -> None:
        by_target: dict[str, list[_AlertRow]] = defaultdict(list)
        for row in self.rows:
            by_target[row.link].append(row)
        built: set[str] = set()
        for page in self.ctx.pairs:
            path = pair_page_path(page.a.symbol, page.b.symbol)
            if path in built:
                raise ComoveError(f"pairs: {page.label!r} appears twice")
            built.add(path)
            self._history_page(
                path=path, kind="pair", title=page.label,
                heading=f"{page.a.symbol} and {page.b.symbol}",
                instruments=(page.a, page.b), members=(), note="",
                measures=page.measures, spans=page.spans, events=page.events,
                acknowledgements=page.acknowledgements, drivers=page.drivers,
                rows=by_target.get(path, []), symbols=(page.a.symbol, page.b.symbol),
            )
        for target in self.ctx.targets:
            path = target_page_path(target.kind, target.label)
            if path in built:
                raise ComoveError(f"targets: {target.kind} {target.label!r} appears twice")
            built.add(path)
            self._history_page(
                path=path, kind=target.kind, title=target.label,
                heading=f"{'Group' if target.kind == 'group' else 'Instrument'} "
                        f"{target.label}",
                instruments=(), members=tuple(target.members), note=target.name,
                measures=target.measures, spans=target.spans, events=target.events,
                acknowledgements=target.acknowledgements, drivers=(),
                rows=by_target.get(path, []), symbols=None,
            )
        # Alerts whose target has no page in the context: a short page from the alerts.
        for path, rows in sorted(by_target.items()):
            if path in built:
                continue
            alert = rows[0].alert
            if alert.target_kind == "pair":
                a, b = alert.target
                instruments = tuple(
                    InstrumentView(s, self.names.get(s, ""), self.ctx.groups.get(s, ""))
                    for s in (a, b)
                )
                heading, symbols = f"{a} and {b}", (a, b)
            else:
                instruments = ()
                word = "Group" if alert.target_kind == "group" else "Instrument"
                heading, symbols = f"{word} {alert.target[0]}", None
            self._history_page(
                path=path, kind=alert.target_kind, title=alert.target_label, heading=heading,
                instruments=instruments, members=(),
                note="No history was supplied for this target: only its alerts are listed.",
                measures=(), spans=(), events=(), acknowledgements=(), drivers=(),
                rows=rows, symbols=symbols,
            )

    def _history_page(
        self, *, path: str, kind: str, title: str, heading: str,
        instruments: tuple[InstrumentView, ...], members: tuple[str, ...], note: str,
        measures: Sequence[MeasureHistory], spans: Sequence[AlertSpan],
        events: Sequence[EventView], acknowledgements: Sequence[AckView],
        drivers: Sequence[DriversView], rows: list[_AlertRow],
        symbols: tuple[str, str] | None,
    ) -> None:
        owner = f"{kind} {title!r}"
        self._claim(path, owner)
        stem = PurePosixPath(path).stem
        folder = str(PurePosixPath(path).parent)
        blocks = []
        for k, history in enumerate(measures, start=1):
            chart_file = f"{stem}-{k}.svg"
            block, request = _measure_block(
                history, spans, chart_file, title, self.ctx.parameters.confidence_level
            )
            self._claim(f"{folder}/{chart_file}", owner)
            self.charts[f"{folder}/{chart_file}"] = request
            blocks.append(block)
        view = _HistoryPage(
            path=path, kind=kind, title=title, heading=heading, instruments=instruments,
            members=members, note=note, blocks=tuple(blocks), alerts=tuple(rows),
            spans=tuple(sorted(spans, key=lambda s: (s.start, _id_key(s.alert_id)))),
            events=tuple(sorted(events, key=_event_order)),
            acknowledgements=tuple(sorted(acknowledgements,
                                          key=lambda a: (a.at, _id_key(a.alert_id)))),
            drivers=tuple(sorted(drivers, key=lambda d: (d.day, _id_key(d.alert_id)))),
            symbols=symbols, alert_ids=frozenset(str(row.alert.id) for row in rows),
        )
        self._add(path, owner, self.render("history.html", "../", "alerts", page=view))


def _default_workers() -> int:
    return max(1, min(4, os.cpu_count() or 1))


def render_site(ctx: SiteContext, *, workers: int = 1) -> dict[str, bytes]:
    """Render every file of the site in memory.

    Parameters
    ----------
    ctx : SiteContext
        What to show.
    workers : int
        Processes drawing the charts (see `svg_charts.render_history_charts`).

    Returns
    -------
    dict of str to bytes
        Site-relative path ("pairs/klv-...html", "/" separators) -> file content.

    Raises
    ------
    ComoveError
        A pair, target or rule appears twice, or two things would share a file name.
    """
    files, charts = _SiteRenderer(ctx).build()
    paths = sorted(charts)
    drawn = svg_charts.render_history_charts([charts[p] for p in paths], workers=workers)
    files.update({path: chart.svg for path, chart in zip(paths, drawn, strict=True)})
    return files


# --- writing -------------------------------------------------------------------------


def _write_if_changed(path: Path, data: bytes) -> bool:
    """Write `data` to `path` unless it already holds exactly that; True when written."""
    try:
        if path.stat().st_size == len(data) and path.read_bytes() == data:
            return False
    except FileNotFoundError:
        pass
    path.parent.mkdir(parents=True, exist_ok=True)
    # Write beside the target and rename over it: a reader sees the old file or the new
    # one, never a partial one (os.replace is atomic within one file system).
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        os.chmod(temporary, 0o644)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return True


@dataclass(frozen=True)
class _Manifest:
    """What the previous build recorded: its files, and each chart's cache key and hash."""

    files: tuple[str, ...]
    charts: dict[str, tuple[str, str]]


def _read_manifest(folder: Path) -> _Manifest:
    try:
        recorded = json.loads((folder / MANIFEST_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return _Manifest((), {})
    if not isinstance(recorded, dict):
        return _Manifest((), {})
    files = []
    listed = recorded.get("files", [])
    for item in listed if isinstance(listed, list) else []:
        # A manifest edited by hand must not be able to point outside the site.
        try:
            files.append(check_relative_path("manifest", str(item)))
        except ComoveError:
            continue
    charts: dict[str, tuple[str, str]] = {}
    entries = recorded.get("charts", {})
    for path, entry in (entries.items() if isinstance(entries, dict) else []):
        if isinstance(entry, list) and len(entry) == 2 and all(isinstance(e, str) for e in entry):
            charts[str(path)] = (entry[0], entry[1])
    return _Manifest(tuple(files), charts)


def _sha256_of(path: Path) -> str | None:
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return None


def _inside(folder: Path, path: Path) -> bool:
    resolved = path.resolve()
    return folder in resolved.parents


def build_site(
    ctx: SiteContext, out_dir: Path | str, *, workers: int | None = None
) -> BuildReport:
    """Render the history site and write it into `out_dir`.

    Parameters
    ----------
    ctx : SiteContext
        What to show.
    out_dir : Path or str
        The site's folder, created if missing. Files the previous build wrote and this
        one does not (pages of pairs no longer present, say) are removed; nothing else in
        the folder is touched.
    workers : int, optional
        Processes drawing charts; by default one per CPU, at most 4 (small sites are
        drawn in this process anyway, see `svg_charts.PARALLEL_MINIMUM`).

    Returns
    -------
    BuildReport
        Counts of files written, unchanged and removed, charts drawn, every file of the
        site, and the digest links whose file is not there (yet).

    Raises
    ------
    ComoveError
        `out_dir` exists and is not a folder, or the context is inconsistent (see
        `render_site`).

    Notes
    -----
    Each file is compared with what is on disk and only rewritten when its bytes differ,
    through a temporary file renamed over the old one, so a reader sees the old page or
    the new one, never a part. A chart is drawn again only when what it is drawn from
    (data, periods, levels, title, the chart code, matplotlib's version) changed since the
    build that wrote it, or its file no longer has the bytes that build wrote: drawing is
    nearly all of a build's time. Files are not fsynced: a crash mid-build is repaired by
    the next build.
    """
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise ComoveError(f"out: {str(folder)!r} exists and is not a folder")
    pages, charts = _SiteRenderer(ctx).build()
    folder.mkdir(parents=True, exist_ok=True)
    folder = folder.resolve()
    previous = _read_manifest(folder)

    written = unchanged = 0
    chart_record: dict[str, tuple[str, str]] = {}
    to_draw: list[str] = []
    for path in sorted(charts):
        key = charts[path].cache_key()
        recorded = previous.charts.get(path)
        on_disk = _sha256_of(folder / path) if recorded and recorded[0] == key else None
        if recorded is not None and on_disk == recorded[1]:
            chart_record[path] = recorded
            unchanged += 1
        else:
            to_draw.append(path)
    drawn = svg_charts.render_history_charts(
        [charts[p] for p in to_draw], workers=_default_workers() if workers is None else workers
    )
    for path, chart in zip(to_draw, drawn, strict=True):
        chart_record[path] = (charts[path].cache_key(), hashlib.sha256(chart.svg).hexdigest())
        if _write_if_changed(folder / path, chart.svg):
            written += 1
        else:
            unchanged += 1
    for path, data in sorted(pages.items()):
        if _write_if_changed(folder / path, data):
            written += 1
        else:
            unchanged += 1

    every_file = set(pages) | set(charts)
    removed = 0
    for relative in previous.files:
        if relative in every_file:
            continue
        target = folder / relative
        # Never follow a link out of the site, whatever the manifest says.
        if target.is_file() and not target.is_symlink() and _inside(folder, target):
            target.unlink()
            removed += 1
    manifest = {
        "format": 1,
        "files": sorted(every_file),
        "charts": {path: list(chart_record[path]) for path in sorted(chart_record)},
    }
    _write_if_changed(
        folder / MANIFEST_NAME, (json.dumps(manifest, indent=0) + "\n").encode("utf-8")
    )
    missing = tuple(d.path for d in ctx.digests if not (folder / d.path).is_file())
    return BuildReport(
        written=written, unchanged=unchanged, removed=removed, charts_drawn=len(to_draw),
        files=tuple(sorted(every_file)), missing_digests=missing,
    )


__all__ = [
    "ALERT_STATES",
    "DIGEST_ARCHIVE_DIR",
    "EVENT_KINDS",
    "MANIFEST_NAME",
    "RUN_KINDS",
    "RUN_STATUSES",
    "SEVERITIES",
    "SITE_ASSETS",
    "TARGET_KINDS",
    "AckView",
    "AlertSpan",
    "AlertSummary",
    "BuildReport",
    "DigestLink",
    "DriverRow",
    "DriversView",
    "EventView",
    "InstrumentView",
    "MeasureHistory",
    "PairPage",
    "RulePage",
    "RunView",
    "SiteContext",
    "SiteParameters",
    "TargetPage",
    "build_site",
    "cautions",
    "check_relative_path",
    "format_count",
    "format_duration",
    "pair_page_path",
    "render_site",
    "rule_page_path",
    "safe_name",
    "target_page_path",
]
