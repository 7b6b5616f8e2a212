"""SVG charts of the history pages, drawn with matplotlib's Agg canvas.

This module owns the one picture of a history page: a measure's full history with its
confidence band, the rule levels as dashed lines and every alert period shaded; and how
many such charts are rendered for a site (one process, or a small pool of processes).

Charts are drawn on a `FigureCanvasAgg` directly (the Agg backend, never pyplot), so no GUI
backend is chosen and no global figure list grows while a site of hundreds of pages is
built. One figure per process is reused from chart to chart: the frame is made once, and
each chart adds and then removes its own artists. matplotlib's axis objects are not drawn;
the ticks come from `monitor.chart_axes` (the value range fitted to the data and levels,
date ticks from matplotlib's `AutoDateLocator` and `ConciseDateFormatter`, the same as the
digest's PNG charts) and are drawn as plain lines and labels. That roughly halves the time
per chart, which is what a site build spends its time on.

Output is deterministic: ``svg.hashsalt`` is fixed, so the ids matplotlib writes inside the
SVG do not change from run to run, and the ``Date`` metadata is dropped; the same request
gives the same bytes whatever was drawn before it. Text is written as SVG ``<text>``
(``svg.fonttype = "none"``) rather than glyph outlines: files are a fraction of the size,
and every string is XML-escaped by matplotlib. Text is drawn with ``parse_math=False``, so a
``$`` in a name is a dollar sign, never mathtext.
"""

from __future__ import annotations

import hashlib
import io
import math
import multiprocessing
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import numpy.typing as npt
from matplotlib.artist import Artist
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import LineCollection
from matplotlib.figure import Figure

from monitor import chart_axes, palette
from monitor._typing import Float1D

WIDTH_IN = 7.2
"""Chart width in inches."""
HEIGHT_IN = 2.4
"""Chart height in inches."""
CSS_PX_PER_IN = 96
"""CSS pixels per inch: the size the page gives the <img> (SVG points are 1/72 in)."""
CHART_WIDTH = round(WIDTH_IN * CSS_PX_PER_IN)
"""Display width of every chart in CSS pixels (691)."""
CHART_HEIGHT = round(HEIGHT_IN * CSS_PX_PER_IN)
"""Display height of every chart in CSS pixels (230)."""

SVG_HASHSALT = "comove-pages"
"""Fixed salt of the ids matplotlib writes into the SVG, so equal charts give equal bytes."""

# Colours from comove's own palette (monitor/palette.py).
INK = palette.INK
MUTED = palette.MUTED
GRID = palette.GRID
LINE = palette.LINE
BAND = palette.BAND
SPAN = palette.SPAN
LEVEL = palette.CRITICAL

HISTORY_CHART_KEY = (
    "Solid line: the value; blue-grey band: its confidence band; warm shading: days an "
    "alert was open; dashed lines: the rule levels. A gap means too few observations."
)
"""The chart's key in words, printed under every chart instead of a legend."""

_AXES_BOX = (0.075, 0.13, 0.91, 0.74)
# Bytes of this very file and of the shared axes: part of every chart's cache key, so a
# change to how charts are drawn (or a new matplotlib) makes every cached chart stale.
def _code_stamp() -> str:
    try:
        code = Path(__file__).read_bytes() + Path(chart_axes.__file__).read_bytes()
    except OSError:  # installed without sources: the version numbers must do
        code = b""
    return hashlib.sha256(code + matplotlib.__version__.encode()).hexdigest()


_CODE_STAMP = _code_stamp()


@dataclass(frozen=True)
class SvgChart:
    """One rendered SVG and the size the page shows it at.

    Attributes
    ----------
    svg : bytes
        The SVG document, UTF-8.
    width, height : int
        Display size in CSS pixels.
    """

    svg: bytes
    width: int
    height: int


@dataclass(frozen=True)
class ChartSpan:
    """A period to shade: an alert from its first day to the day it cleared.

    Attributes
    ----------
    start : date
        First day of the alert.
    end : date or None
        Day it cleared; None while it is still open (shaded to the last date drawn).
    """

    start: date
    end: date | None


_EPOCH_ORDINAL = date(1970, 1, 1).toordinal()


def _as_days(dates: Sequence[date] | npt.NDArray[np.datetime64]) -> npt.NDArray[np.datetime64]:
    if isinstance(dates, np.ndarray):
        return dates.astype("datetime64[D]").reshape(-1)
    # numpy converts date objects one by one through a slow path; ordinals are ten times
    # faster, and a site converts a few hundred thousand dates.
    ordinals = np.fromiter((d.toordinal() for d in dates), dtype=np.int64, count=len(dates))
    return (ordinals - _EPOCH_ORDINAL).astype("datetime64[D]")


def _as_float(values: Sequence[float] | Float1D) -> Float1D:
    return np.asarray(values, dtype=np.float64).reshape(-1)


@dataclass(frozen=True, eq=False)
class HistoryChartRequest:
    """Everything one history chart is drawn from (picklable, for a worker process).

    Attributes
    ----------
    dates : ndarray of datetime64[D], shape (T,)
        Business days, ascending; T may be 0.
    values, band_low, band_high : ndarray, shape (T,)
        The measure and its confidence band; NaN leaves a gap.
    spans : tuple of ChartSpan
        Alert periods to shade.
    levels : tuple of float
        Rule levels, dashed lines; NaN ones are skipped.
    title : str
        Short title above the plot, drawn literally.
    """

    dates: npt.NDArray[np.datetime64]
    values: Float1D
    band_low: Float1D
    band_high: Float1D
    spans: tuple[ChartSpan, ...] = ()
    levels: tuple[float, ...] = ()
    title: str = ""

    @classmethod
    def build(
        cls,
        dates: Sequence[date] | npt.NDArray[np.datetime64],
        values: Sequence[float] | Float1D,
        band_low: Sequence[float] | Float1D,
        band_high: Sequence[float] | Float1D,
        *,
        spans: Sequence[ChartSpan] = (),
        levels: Sequence[float] = (),
        title: str = "",
    ) -> HistoryChartRequest:
        """Make a request from any array-likes, checking that the four have one length.

        Raises
        ------
        ValueError
            The four arrays differ in length.
        """
        x = _as_days(dates)
        y, low, high = _as_float(values), _as_float(band_low), _as_float(band_high)
        if not (x.shape == y.shape == low.shape == high.shape):
            raise ValueError(
                f"history arrays differ in length: dates {x.shape}, values {y.shape}, "
                f"band_low {low.shape}, band_high {high.shape}"
            )
        return cls(x, y, low, high, tuple(spans), tuple(float(v) for v in levels), title)

    def cache_key(self) -> str:
        """SHA-256 hex of the request and of this module's code: equal keys, equal SVG."""
        digest = hashlib.sha256(_CODE_STAMP.encode())
        for array in (self.dates.astype(np.int64), self.values, self.band_low, self.band_high):
            digest.update(np.ascontiguousarray(array).tobytes())
            digest.update(b"|")
        for span in self.spans:
            digest.update(f"{span.start}:{span.end};".encode())
        digest.update(repr(self.levels).encode())
        digest.update(self.title.encode("utf-8", "surrogatepass"))
        return digest.hexdigest()


class _Painter:
    """One reusable figure; `draw` adds a chart's artists, saves, and removes them."""

    def __init__(self) -> None:
        self.figure = Figure(figsize=(WIDTH_IN, HEIGHT_IN))
        FigureCanvasAgg(self.figure)
        self.axes = self.figure.add_axes(_AXES_BOX)
        self.axes.set_axis_off()

    def draw(self, request: HistoryChartRequest) -> bytes:
        axes = self.axes
        x_days = request.dates
        # Plain floats (days since 1970) keep matplotlib's date-unit machinery out of it.
        x = x_days.astype(np.int64).astype(np.float64)
        if x.size:
            left, right = float(x[0]), float(x[-1])
            if right <= left:
                left, right = left - 1.0, right + 1.0
        else:
            left, right = 0.0, 1.0
        # The value axis fits the values, the band and the levels (monitor.chart_axes).
        bottom, top = chart_axes.value_limits(
            (request.values, request.band_low, request.band_high), request.levels)
        axes.set_xlim(left, right)
        axes.set_ylim(bottom, top)
        y_ticks = chart_axes.value_ticks(bottom, top)
        added: list[Artist] = []
        label_x = left - 0.01 * (right - left)
        for tick in y_ticks:
            added.append(axes.text(label_x, tick, chart_axes.value_label(tick, y_ticks),
                                   ha="right", va="center", fontsize=7, color=MUTED,
                                   parse_math=False, clip_on=False))
        grid = [[(left, tick), (right, tick)] for tick in y_ticks]
        below = bottom - 0.025 * (top - bottom)
        if x.size:
            dates = chart_axes.date_ticks(x_days[0], x_days[-1])
            for day, text in dates.ticks:
                position = float(day.astype(np.int64))
                grid.append([(position, bottom), (position, top)])
                added.append(axes.text(position, below, text, ha="center", va="top",
                                       fontsize=7, color=MUTED, parse_math=False,
                                       clip_on=False))
            if dates.offset:
                added.append(axes.text(right, top, dates.offset, ha="right", va="bottom",
                                       fontsize=7, color=MUTED, parse_math=False,
                                       clip_on=False))
        added.append(axes.add_collection(LineCollection(grid, colors=GRID, linewidths=0.5)))
        if bottom < 0.0 < top:
            added.append(axes.add_collection(
                LineCollection([[(left, 0.0), (right, 0.0)]], colors=MUTED, linewidths=0.5)))
        if x.size:
            for span in request.spans:
                start = float(np.datetime64(span.start, "D").astype(np.int64))
                end = right if span.end is None else float(
                    np.datetime64(span.end, "D").astype(np.int64))
                # A one-day alert would have no width: widen it to a day so it shows.
                added.append(axes.axvspan(start, max(end, start + 1.0), color=SPAN,
                                          alpha=0.6, linewidth=0))
            low, high = request.band_low, request.band_high
            band_known = np.isfinite(low) & np.isfinite(high)
            if band_known.any():
                added.append(axes.fill_between(
                    x, np.where(band_known, low, 0.0), np.where(band_known, high, 0.0),
                    where=band_known, color=BAND, linewidth=0,
                ))
            added.extend(axes.plot(x, request.values, color=LINE, linewidth=0.9))
        for level in request.levels:
            if math.isfinite(level):
                added.append(axes.axhline(level, color=LEVEL, linewidth=0.8, linestyle="--"))
        if request.title:
            added.append(self.figure.text(_AXES_BOX[0], 0.93, request.title, fontsize=8,
                                          color=INK, parse_math=False))
        buffer = io.BytesIO()
        try:
            with matplotlib.rc_context({"svg.hashsalt": SVG_HASHSALT, "svg.fonttype": "none"}):
                self.figure.savefig(buffer, format="svg", metadata={"Date": None})
        finally:
            for artist in added:
                artist.remove()
        return buffer.getvalue()


_painter: _Painter | None = None
# rc_context changes process-wide settings and the painter's figure is shared: one chart
# at a time per process. Parallel builds use processes (`render_history_charts`).
_painter_lock = threading.Lock()


def render_request(request: HistoryChartRequest) -> SvgChart:
    """Draw one requested chart (see `history_chart` for what is drawn)."""
    global _painter
    with _painter_lock:
        if _painter is None:
            _painter = _Painter()
        svg = _painter.draw(request)
    return SvgChart(svg=svg, width=CHART_WIDTH, height=CHART_HEIGHT)


def history_chart(
    dates: Sequence[date] | npt.NDArray[np.datetime64],
    values: Sequence[float] | Float1D,
    band_low: Sequence[float] | Float1D,
    band_high: Sequence[float] | Float1D,
    *,
    spans: Sequence[ChartSpan] = (),
    levels: Sequence[float] = (),
    title: str = "",
) -> SvgChart:
    """Draw a measure's full history with its band, rule levels and alert periods.

    Parameters
    ----------
    dates : sequence of date, shape (T,)
        Business days, ascending. T may be 0 (an empty frame with the value axis only).
    values, band_low, band_high : array_like, shape (T,)
        The measure and its confidence band per day. NaN leaves a gap in the line (and,
        where either band edge is NaN, in the band), never a drop to zero.
    spans : sequence of ChartSpan
        Alert periods, shaded; an open one (``end`` None) runs to the last date.
    levels : sequence of float
        Rule levels drawn as dashed horizontal lines; NaN ones are skipped.
    title : str
        Short title above the plot (drawn literally: no mathtext).

    Returns
    -------
    SvgChart
        A 7.2 x 2.4 inch SVG, shown at `CHART_WIDTH` x `CHART_HEIGHT` CSS pixels, y axis
        fitted to the values, band and levels (`monitor.chart_axes.value_limits`). Its line styles
        are described in words by `HISTORY_CHART_KEY`.

    Raises
    ------
    ValueError
        The four arrays differ in length.
    """
    return render_request(HistoryChartRequest.build(
        dates, values, band_low, band_high, spans=spans, levels=levels, title=title,
    ))


def _render_svg(request: HistoryChartRequest) -> bytes:
    return render_request(request).svg


PARALLEL_MINIMUM = 64
"""Fewest charts worth starting worker processes for (each costs about a second to start)."""


def render_history_charts(
    requests: Sequence[HistoryChartRequest], workers: int = 1,
    progress: Callable[[int, int], None] | None = None,
) -> list[SvgChart]:
    """Draw many charts, in this process or in a pool of worker processes.

    Parameters
    ----------
    requests : sequence of HistoryChartRequest
        The charts, in any order.
    workers : int
        Processes to use; 1 (or fewer than `PARALLEL_MINIMUM` charts) draws here. Workers
        are started with "spawn", never "fork", so a caller's threads (a server, a
        browser driver) cannot leave a lock held in the child.
    progress : callable, optional
        Called as ``progress(done, total)`` about every 10 % of the charts and at the end.

    Returns
    -------
    list of SvgChart
        One per request, in the same order; identical bytes whichever way they were drawn.
    """
    total = len(requests)
    step = max(1, total // 10)

    def told(done: int) -> None:
        if progress is not None and (done % step == 0 or done == total):
            progress(done, total)

    if workers <= 1 or total < PARALLEL_MINIMUM:
        drawn = []
        for request in requests:
            drawn.append(render_request(request))
            told(len(drawn))
        return drawn
    context: Any = multiprocessing.get_context("spawn")
    chunk = max(1, total // (workers * 8))
    svgs: list[bytes] = []
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
        for svg in pool.map(_render_svg, requests, chunksize=chunk):
            svgs.append(svg)
            told(len(svgs))
    return [SvgChart(svg=svg, width=CHART_WIDTH, height=CHART_HEIGHT) for svg in svgs]


__all__ = [
    "CHART_HEIGHT",
    "CHART_WIDTH",
    "HISTORY_CHART_KEY",
    "PARALLEL_MINIMUM",
    "ChartSpan",
    "HistoryChartRequest",
    "SvgChart",
    "history_chart",
    "render_history_charts",
    "render_request",
]
