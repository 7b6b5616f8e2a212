"""Axes shared by the digest's PNG charts and the pages' SVG charts: the value range fitted
to what is drawn, value ticks, and date ticks from matplotlib's date locator and formatter.

Pure functions of the numbers to draw; no figure is made here. The PNG charts hand the
limits to a real matplotlib axis; the SVG painter draws its own tick lines and labels from
the same ticks, so both kinds of chart read alike.

- `value_limits` fits the y-axis to the finite values, band edges and the rule's levels,
  with a small margin, a minimum span (a flat line is not blown up into noise) and, for
  correlations, never beyond -1..1 plus the margin. A pair living between 0.8 and 0.95 with
  a level at 0.7 gets an axis of about 0.68..0.97, not -1..1.
- `value_ticks` are "nice" numbers from `matplotlib.ticker.MaxNLocator`.
- `date_ticks` asks `matplotlib.dates.AutoDateLocator` where the ticks fall and
  `ConciseDateFormatter` how to label them (years, months, or days with the month), so a
  week, a year and twenty years all get a handful of readable labels.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter, date2num, get_epoch, num2date
from matplotlib.ticker import MaxNLocator

CORRELATION_BOUNDS = (-1.0, 1.0)
"""Where a correlation can lie; the fitted axis never goes further than these plus a margin."""
MARGIN = 0.05
"""Fraction of the fitted span added above and below the data."""
MIN_CORRELATION_SPAN = 0.2
"""Smallest y span of a correlation chart (a steady 0.9 still shows wiggles as wiggles)."""

DATE_FORMATS = ["%Y", "%b", "%b %d", "%H:%M", "%H:%M", "%S.%f"]
"""Tick labels by tick level (years, months, days, ...): a day tick reads "Mar 09"."""
DATE_ZERO_FORMATS = ["", "%Y", "%b", "%b %d", "%H:%M", "%H:%M"]
"""Labels of ticks at the start of the next level up: January reads "2026", a month's 1st "Mar"."""
DATE_OFFSET_FORMATS = ["", "%Y", "%Y", "%Y", "%Y-%m-%d", "%Y-%m-%d"]
"""The axis's offset text (the year the labels leave out), drawn at its right end."""


def _finite(arrays: Iterable[Sequence[float] | npt.NDArray[np.float64]]) -> list[float]:
    found: list[float] = []
    for array in arrays:
        values = np.asarray(array, dtype=np.float64).reshape(-1)
        values = values[np.isfinite(values)]
        if values.size:
            found.extend((float(values.min()), float(values.max())))
    return found


def value_limits(
    arrays: Iterable[Sequence[float] | npt.NDArray[np.float64]],
    levels: Iterable[float | None] = (),
    *,
    bounds: tuple[float, float] | None = CORRELATION_BOUNDS,
    min_span: float = MIN_CORRELATION_SPAN,
) -> tuple[float, float]:
    """The y-axis range that shows every finite value and level with a small margin.

    Parameters
    ----------
    arrays : iterable of array_like
        What is drawn (values, band edges); NaN and infinities are ignored.
    levels : iterable of float or None
        Horizontal lines that must stay in view (the rule's level, where it clears).
    bounds : (float, float) or None
        Where the quantity can lie (-1..1 for a correlation); the axis never passes them by
        more than `MARGIN` of their width. None: unbounded (prices, rebased values).
    min_span : float
        Smallest span before margins; a narrower range is widened about its middle (and
        shifted back inside `bounds`).

    Returns
    -------
    (float, float)
        Lower and upper limit, lower < upper. With nothing finite to show: `bounds` plus
        the margin, or (0, 1) without bounds.
    """
    points = _finite(arrays) + [float(v) for v in levels if v is not None and math.isfinite(v)]
    if bounds is not None:
        b_low, b_high = bounds
        reach = MARGIN * (b_high - b_low)
        points = [min(max(p, b_low), b_high) for p in points]
    if not points:
        if bounds is None:
            return 0.0, 1.0
        return bounds[0] - reach, bounds[1] + reach
    low, high = min(points), max(points)
    if high - low < min_span:
        middle = (low + high) / 2.0
        low, high = middle - min_span / 2.0, middle + min_span / 2.0
        if bounds is not None:
            if low < bounds[0]:
                low, high = bounds[0], bounds[0] + min_span
            elif high > bounds[1]:
                low, high = bounds[1] - min_span, bounds[1]
    pad = MARGIN * (high - low)
    low, high = low - pad, high + pad
    if bounds is not None:
        low, high = max(low, bounds[0] - reach), min(high, bounds[1] + reach)
    if high <= low:  # min_span <= 0 and a single point
        low, high = low - 0.5, high + 0.5
    return low, high


def value_ticks(low: float, high: float, max_ticks: int = 5) -> list[float]:
    """Round tick values inside [low, high] (matplotlib's `MaxNLocator`, steps 1/2/2.5/5)."""
    locator = MaxNLocator(nbins=max_ticks, steps=[1, 2, 2.5, 5, 10])
    ticks = locator.tick_values(low, high)
    tolerance = 1e-9 * max(1.0, abs(high - low))
    return [float(round(t, 12)) + 0.0 for t in ticks if low - tolerance <= t <= high + tolerance]


def value_label(value: float, ticks: Sequence[float]) -> str:
    """A tick label with as many decimals as the tick step needs, and a true minus sign."""
    step = min((abs(b - a) for a, b in zip(ticks, ticks[1:], strict=False)), default=1.0)
    decimals = 0 if step >= 1 else min(6, max(1, -math.floor(math.log10(step) + 1e-9)))
    if decimals and not math.isclose(round(step, decimals), step, abs_tol=1e-12):
        decimals += 1  # a step of 0.25 needs two decimals, 0.2 one
    text = f"{value:.{decimals}f}"
    if text.startswith("-") and float(text) == 0.0:
        text = text[1:]
    return "\u2212" + text[1:] if text.startswith("-") else text


@dataclass(frozen=True)
class DateAxis:
    """Ticks of a date axis.

    Attributes
    ----------
    ticks : tuple of (datetime64[D], str)
        Tick days inside the drawn range, ascending, with their labels.
    offset : str
        What the labels leave out (the year of day or month ticks), for the axis's right
        end; "" when the labels say it all.
    """

    ticks: tuple[tuple[np.datetime64, str], ...]
    offset: str


def date_locator(max_ticks: int = 7) -> AutoDateLocator:
    """The locator used by every chart: at least 3 and at most `max_ticks` ticks."""
    return AutoDateLocator(minticks=3, maxticks=max_ticks)


def date_formatter(locator: AutoDateLocator) -> ConciseDateFormatter:
    """The formatter used by every chart (`DATE_FORMATS`, zero and offset formats)."""
    return ConciseDateFormatter(
        locator, formats=DATE_FORMATS, zero_formats=DATE_ZERO_FORMATS,
        offset_formats=DATE_OFFSET_FORMATS,
    )


def date_ticks(first: np.datetime64, last: np.datetime64, max_ticks: int = 7) -> DateAxis:
    """Where the ticks of a date axis from `first` to `last` fall, and their labels.

    Parameters
    ----------
    first, last : numpy.datetime64
        Ends of the axis, ``first <= last`` (any resolution; days are used).
    max_ticks : int
        Most ticks wanted (matplotlib's locator may give one more at a round boundary).

    Returns
    -------
    DateAxis
        Ticks from `matplotlib.dates.AutoDateLocator` labelled by `ConciseDateFormatter`,
        kept to whole days inside [first, last]; when month ticks span years, the first
        also carries its year ("Dec 2025", "2026", "Feb"). Spans too short for the locator to tick
        whole days (under three days) get a tick on each day.
    """
    start = np.asarray(first).astype("datetime64[D]")[()]
    end = np.asarray(last).astype("datetime64[D]")[()]
    if end < start:
        raise ValueError(f"date axis ends before it starts: {start} to {end}")
    locator = date_locator(max_ticks)
    formatter = date_formatter(locator)
    low, high = float(date2num(start)), float(date2num(end))
    # The formatter asks the locator's axis for the view; a dummy axis carries it.
    locator.create_dummy_axis()
    locator.axis.set_view_interval(low, high)  # type: ignore[union-attr]
    if high - low < 3:
        # Too short for the locator to tick whole days (it would tick hours): each day.
        positions = [low + k for k in range(int(high - low) + 1)]
        labels = [num2date(p).strftime(DATE_FORMATS[2]) for p in positions]
        offset = num2date(high).strftime(DATE_OFFSET_FORMATS[2])
    else:
        values = locator.tick_values(num2date(low), num2date(high))
        positions = [float(v) for v in values if low <= v <= high and float(v).is_integer()]
        labels = formatter.format_ticks(positions) if positions else []
        offset = formatter.get_offset() if positions else ""
        if labels and not offset and labels[0].isalpha():
            # Month ticks across years: the first month says its year too ("May 1990");
            # later ones follow from the January ticks, which read as the year.
            labels[0] = f"{labels[0]} {num2date(positions[0]).year}"
    # matplotlib's date numbers are days since its epoch, 1970-01-01 unless changed.
    epoch = np.datetime64(get_epoch(), "D")
    ticks = tuple(
        (epoch + np.timedelta64(int(p), "D"), label)
        for p, label in zip(positions, labels, strict=True)
    )
    return DateAxis(ticks=ticks, offset=offset)


__all__ = [
    "CORRELATION_BOUNDS",
    "DATE_FORMATS",
    "DateAxis",
    "MARGIN",
    "MIN_CORRELATION_SPAN",
    "date_formatter",
    "date_locator",
    "date_ticks",
    "value_label",
    "value_limits",
    "value_ticks",
]
