"""PNG charts for the digest and the history pages, drawn with matplotlib's Agg canvas.

This module owns the pictures: an alert's measure over its last year with band, level and
clear lines; a correlation heatmap per group with instruments ordered by average-linkage
clustering (written here in numpy, so scipy is not a runtime dependency), each cell
carrying its value; the rectangle of correlations between two groups (a `between` rule's
pairs, the hedge a desk holds); and a small history of a group's average pairwise
correlation. Every chart is drawn on a
`FigureCanvasAgg` directly, never through pyplot, so no GUI backend is ever chosen, no
global figure state is kept, and concurrent renders cannot interfere.

Output is deterministic and small: each chart is drawn on the Agg canvas and stored by
pillow as an 8-bit palette PNG (`PALETTE_COLOURS`), with no software version or timestamp
in the file, so the same inputs give the same bytes. Images are rendered at twice their display size
(`DPI` = 200 against `DISPLAY_DPI` = 100) to stay sharp on high-density screens.
"""

from __future__ import annotations

import io
import struct
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date

import numpy as np
import numpy.typing as npt
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure
from PIL import Image

from monitor import chart_axes, palette
from monitor._typing import CorrMatrix, Float1D

DPI = 200
"""Pixels per inch of the PNG files."""
DISPLAY_DPI = 100
"""Pixels per inch the HTML displays them at: the files carry 2x the displayed pixels."""

# Colours from comove's own palette (monitor/palette.py).
INK = palette.INK
MUTED = palette.MUTED
GRID = palette.GRID
LINE = palette.LINE
BAND = palette.BAND
LEVEL = palette.CRITICAL
CLEAR = palette.INFO
START = palette.START

# The correlation map: slate blue for negative, clay for positive, near-white at zero, so
# the sign reads even in greyscale print (darker = stronger); missing values are paper.
CORRELATION_CMAP = LinearSegmentedColormap.from_list(
    "comove_correlation", list(palette.CORRELATION_STOPS)
).with_extremes(bad=palette.PAPER)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

ALERT_CHART_KEY = (
    "Solid line: the value; shaded: its confidence band; dashed: the level; "
    "dotted: where the alert clears; vertical line: the alert's first day."
)
"""The alert chart's key in words, printed under each chart instead of a legend."""


@dataclass(frozen=True)
class ChartImage:
    """One rendered PNG and the size to display it at.

    Attributes
    ----------
    png : bytes
        The PNG file.
    width, height : int
        Display size in CSS pixels (half the PNG's pixel size).
    """

    png: bytes
    width: int
    height: int


def png_size(png: bytes) -> tuple[int, int]:
    """Return (width, height) in pixels read from a PNG's IHDR chunk."""
    if png[:8] != PNG_SIGNATURE:
        raise ValueError("not a PNG file: signature missing")
    width, height = struct.unpack(">II", png[16:24])
    return int(width), int(height)


def _figure(width_in: float, height_in: float) -> Figure:
    figure = Figure(figsize=(width_in, height_in), dpi=DPI)
    FigureCanvasAgg(figure)
    return figure


PALETTE_COLOURS = 256
"""Colours of the PNG palette: charts are stored as 8-bit palette images, a third of the
bytes of full-colour ones, so a digest with a dozen charts stays small enough to mail."""


def _to_image(figure: Figure) -> ChartImage:
    canvas = figure.canvas
    assert isinstance(canvas, FigureCanvasAgg)
    canvas.draw()
    rgb = Image.frombuffer("RGBA", canvas.get_width_height(), canvas.buffer_rgba(),
                           "raw", "RGBA", 0, 1).convert("RGB")
    # Median cut without dithering: flat colours (lines, band, cells) stay flat, and the
    # same figure gives the same palette, so bytes are identical run to run. Pillow writes
    # no timestamp or software name into the file.
    palette = rgb.quantize(colors=PALETTE_COLOURS, method=Image.Quantize.MEDIANCUT,
                           dither=Image.Dither.NONE)
    buffer = io.BytesIO()
    palette.save(buffer, format="PNG", optimize=True)
    width_in, height_in = figure.get_size_inches()
    return ChartImage(
        png=buffer.getvalue(),
        width=round(width_in * DISPLAY_DPI),
        height=round(height_in * DISPLAY_DPI),
    )


def _style_axes(axes: Axes) -> None:
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        axes.spines[side].set_color(GRID)
    axes.tick_params(colors=MUTED, labelsize=7)
    axes.grid(True, color=GRID, linewidth=0.5)
    axes.set_axisbelow(True)


def _as_dates(dates: Sequence[date] | npt.NDArray[np.datetime64]) -> npt.NDArray[np.datetime64]:
    return np.asarray(dates, dtype="datetime64[D]")


def _as_float(values: Sequence[float] | Float1D) -> Float1D:
    return np.asarray(values, dtype=np.float64)


def alert_history_figure(
    dates: Sequence[date] | npt.NDArray[np.datetime64],
    values: Sequence[float] | Float1D,
    band_low: Sequence[float] | Float1D,
    band_high: Sequence[float] | Float1D,
    *,
    level: float | None = None,
    clear_level: float | None = None,
    start: date | None = None,
    title: str = "",
) -> Figure:
    """Draw one alert's measure with its confidence band, level, clear level and start.

    Parameters
    ----------
    dates : sequence of date, shape (T,)
        Business days, ascending.
    values, band_low, band_high : array_like, shape (T,)
        Measure value and its confidence band per day. NaN leaves a gap in the line and
        the band (a day without enough observations), never a drop to zero.
    level, clear_level : float, optional
        Horizontal lines: where the alert opens (dashed) and where it clears (dotted).
    start : date, optional
        First day of the alert, marked by a vertical line.
    title : str
        Short title above the plot.

    Returns
    -------
    Figure
        A 6.4 x 2.2 inch figure on an Agg canvas; `alert_history_chart` makes it a PNG.
        The line styles are described by `ALERT_CHART_KEY`, printed beneath the chart.
    """
    x = _as_dates(dates)
    y = _as_float(values)
    low = _as_float(band_low)
    high = _as_float(band_high)
    if not (x.shape == y.shape == low.shape == high.shape):
        raise ValueError(
            f"history arrays differ in length: dates {x.shape}, values {y.shape}, "
            f"band_low {low.shape}, band_high {high.shape}"
        )
    figure = _figure(6.4, 2.2)
    axes = figure.add_axes((0.08, 0.14, 0.9, 0.72))
    _style_axes(axes)
    if x.size:
        band_known = np.isfinite(low) & np.isfinite(high)
        axes.fill_between(
            x, np.where(band_known, low, 0.0), np.where(band_known, high, 0.0),
            where=band_known, color=BAND, linewidth=0, label="band",
        )
        axes.plot(x, y, color=LINE, linewidth=1.1, label="value")
        locator = chart_axes.date_locator(7)
        axes.xaxis.set_major_locator(locator)
        axes.xaxis.set_major_formatter(chart_axes.date_formatter(locator))
    if level is not None and np.isfinite(level):
        axes.axhline(level, color=LEVEL, linewidth=0.9, linestyle="--", label="level")
    if clear_level is not None and np.isfinite(clear_level):
        axes.axhline(clear_level, color=CLEAR, linewidth=0.9, linestyle=":", label="clears at")
    if start is not None:
        # matplotlib's date converter turns the datetime64 into its float axis units.
        axes.axvline(
            np.datetime64(start, "D"),  # type: ignore[arg-type]
            color=START, linewidth=0.9, label="alert start",
        )
    # Fitted to the value, its band and both levels (monitor.chart_axes), never -1..1 by
    # default: a pair living between 0.8 and 0.95 must not be a flat line.
    bottom, top = chart_axes.value_limits((y, low, high), (level, clear_level))
    axes.set_ylim(bottom, top)
    y_ticks = chart_axes.value_ticks(bottom, top)
    axes.set_yticks(y_ticks, labels=[chart_axes.value_label(t, y_ticks) for t in y_ticks])
    # No legend: the page prints the key in words under the chart (readable by screen
    # readers, and drawing a legend cost a fifth of the chart's time).
    if title:
        figure.text(0.08, 0.93, title, fontsize=8, color=INK)
    return figure


def alert_history_chart(
    dates: Sequence[date] | npt.NDArray[np.datetime64],
    values: Sequence[float] | Float1D,
    band_low: Sequence[float] | Float1D,
    band_high: Sequence[float] | Float1D,
    *,
    level: float | None = None,
    clear_level: float | None = None,
    start: date | None = None,
    title: str = "",
) -> ChartImage:
    """Draw `alert_history_figure` (same parameters) as a PNG.

    Returns
    -------
    ChartImage
        A 6.4 x 2.2 inch chart (1280 x 440 pixels, displayed at 640 x 220).
    """
    return _to_image(alert_history_figure(
        dates, values, band_low, band_high, level=level, clear_level=clear_level,
        start=start, title=title,
    ))


def average_linkage(distance: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """Agglomerative clustering with average linkage (UPGMA) on a distance matrix.

    Parameters
    ----------
    distance : ndarray, shape (N, N)
        Symmetric distances with zero diagonal. Must be finite.

    Returns
    -------
    ndarray, shape (N - 1, 4)
        One row per merge, in the layout scipy uses: the two cluster ids merged (leaves
        are 0..N-1, the cluster made by row i is N + i), the distance at which they merged
        and the size of the new cluster. Ties go to the lowest pair of cluster ids.

    Notes
    -----
    The distance from a merged cluster to every other one is the size-weighted mean of
    its two parts' distances (Lance-Williams update for average linkage), which equals
    the mean over all leaf pairs. O(N^3) in the worst case, fine for a group of a few
    hundred instruments.
    """
    d = np.array(distance, dtype=np.float64)
    n = d.shape[0]
    if d.shape != (n, n):
        raise ValueError(f"distance must be square, got shape {d.shape}")
    linkage = np.zeros((max(n - 1, 0), 4))
    if n < 2:
        return linkage
    work = d.copy()
    np.fill_diagonal(work, np.inf)
    active = np.ones(n, dtype=bool)
    ids = np.arange(n)
    sizes = np.ones(n)
    for step in range(n - 1):
        flat = int(np.argmin(work))
        i, j = divmod(flat, n)
        if i > j:
            i, j = j, i
        height = work[i, j]
        a, b = int(ids[i]), int(ids[j])
        linkage[step] = (min(a, b), max(a, b), height, sizes[i] + sizes[j])
        # The merged cluster takes slot i; slot j is retired.
        merged = (sizes[i] * work[i] + sizes[j] * work[j]) / (sizes[i] + sizes[j])
        merged[~active] = np.inf
        merged[i] = np.inf
        merged[j] = np.inf
        work[i, :] = merged
        work[:, i] = merged
        work[j, :] = np.inf
        work[:, j] = np.inf
        active[j] = False
        sizes[i] += sizes[j]
        ids[i] = n + step
    return linkage


def leaf_order(linkage: npt.NDArray[np.float64]) -> npt.NDArray[np.intp]:
    """Return the leaves of a linkage matrix in dendrogram order, left branch first.

    Parameters
    ----------
    linkage : ndarray, shape (N - 1, 4)
        As returned by `average_linkage`.

    Returns
    -------
    ndarray of int, shape (N,)
        A permutation of 0..N-1 in which every cluster's members are contiguous.
    """
    n = linkage.shape[0] + 1
    if n == 1:
        return np.zeros(1, dtype=np.intp)
    order: list[int] = []
    stack = [2 * n - 2]
    while stack:
        node = stack.pop()
        if node < n:
            order.append(node)
            continue
        left, right = linkage[node - n, :2].astype(int)
        stack.append(int(right))
        stack.append(int(left))
    return np.array(order, dtype=np.intp)


def cluster_order(matrix: CorrMatrix) -> npt.NDArray[np.intp]:
    """Order instruments so that those which move together sit next to each other.

    Parameters
    ----------
    matrix : ndarray, shape (N, N)
        Correlation matrix. NaN (a pair without enough common days) counts as distance 1,
        the same as a correlation of 0, for ordering only.

    Returns
    -------
    ndarray of int, shape (N,)
        Permutation from average-linkage clustering on the distance 1 - r.
    """
    r = np.asarray(matrix, dtype=np.float64)
    distance = 1.0 - np.where(np.isfinite(r), np.clip(r, -1.0, 1.0), 0.0)
    distance = (distance + distance.T) / 2.0
    np.fill_diagonal(distance, 0.0)
    return leaf_order(average_linkage(distance))


CELL_VALUES_MAX = 15
"""Largest side of a matrix whose cells are written with their values (beyond that the
digits would be too small to read; the table or CSV beside the chart has them)."""
LABELS_MAX = 40
"""Largest side of a matrix whose rows and columns are labelled with their symbols."""


def _cell_text_colour(value: float) -> str:
    # Dark ends of the palette get white digits, the pale middle gets ink.
    return palette.PAPER if abs(value) >= 0.55 else INK


def matrix_figure(
    row_symbols: Sequence[str], column_symbols: Sequence[str], matrix: CorrMatrix, *,
    title: str = "",
) -> Figure:
    """Draw a correlation matrix as it is (no reordering): cells, labels, values, colour bar.

    Parameters
    ----------
    row_symbols, column_symbols : sequence of str, lengths R and C
        Labels of the rows (left) and columns (top).
    matrix : ndarray, shape (R, C)
        Correlations; NaN cells are left white (and written "n/a" when values are shown).
    title : str
        Short title above the plot.

    Returns
    -------
    Figure
        On an Agg canvas, laid out by matplotlib's constrained layout, so no label of the
        rows, columns or colour bar is cut off at the figure's edge. Cells carry their
        value (two decimals) when neither side is longer than `CELL_VALUES_MAX`.
    """
    r = np.asarray(matrix, dtype=np.float64)
    rows, columns = len(row_symbols), len(column_symbols)
    if r.shape != (rows, columns):
        raise ValueError(f"matrix shape {r.shape} does not match {rows} x {columns} symbols")
    longest = max(rows, columns)
    cell = 0.42 if longest <= CELL_VALUES_MAX else 0.12
    width = float(min(9.0, max(4.2, cell * columns + 2.2)))
    height = float(min(9.0, max(2.4, cell * rows + 1.8)))
    figure = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.add_subplot()
    image = axes.imshow(
        np.ma.masked_invalid(r), cmap=CORRELATION_CMAP, vmin=-1.0, vmax=1.0,
        interpolation="nearest", aspect="equal",
    )
    axes.tick_params(length=0, colors=INK)
    for spine in axes.spines.values():
        spine.set_visible(False)
    if longest <= LABELS_MAX:
        fontsize = 7 if longest <= CELL_VALUES_MAX else 5
        axes.set_xticks(np.arange(columns), labels=list(column_symbols), rotation=90,
                        fontsize=fontsize)
        axes.set_yticks(np.arange(rows), labels=list(row_symbols), fontsize=fontsize)
        axes.xaxis.tick_top()
    else:
        # Beyond ~40 labels they overprint; the table or file beside the chart names them.
        axes.set_xticks([])
        axes.set_yticks([])
    if longest <= CELL_VALUES_MAX:
        for i in range(rows):
            for j in range(columns):
                value = float(r[i, j])
                known = np.isfinite(value)
                text = f"{value:.2f}".replace("-", "\u2212") if known else "n/a"
                axes.text(j, i, text, ha="center", va="center", fontsize=6,
                          color=_cell_text_colour(value) if known else MUTED)
    colorbar = figure.colorbar(image, ax=axes, shrink=0.8, aspect=25, pad=0.02)
    colorbar.set_ticks([-1.0, -0.5, 0.0, 0.5, 1.0],
                       labels=["\u22121", "\u22120.5", "0", "0.5", "1"])
    colorbar.ax.tick_params(labelsize=6, colors=MUTED)
    colorbar.outline.set_visible(False)
    if title:
        figure.suptitle(title, fontsize=8, color=INK, x=0.02, ha="left")
    return figure


def heatmap_chart(
    symbols: Sequence[str], matrix: CorrMatrix, *, title: str = ""
) -> tuple[ChartImage, tuple[str, ...]]:
    """Draw a group's correlation matrix, instruments ordered by `cluster_order`.

    Parameters
    ----------
    symbols : sequence of str, length N
        Instrument symbols in the matrix's row order; N must be at least 2.
    matrix : ndarray, shape (N, N)
        Correlations; NaN cells are left white.
    title : str
        Short title above the plot.

    Returns
    -------
    image : ChartImage
        The matrix drawn by `matrix_figure` (values in the cells up to `CELL_VALUES_MAX`
        instruments, labels never cut off).
    ordered_symbols : tuple of str
        The symbols in the order drawn, so a table beside the chart can follow it.
    """
    r = np.asarray(matrix, dtype=np.float64)
    n = len(symbols)
    if r.shape != (n, n):
        raise ValueError(f"matrix shape {r.shape} does not match {n} symbols")
    if n < 2:
        raise ValueError(f"a heatmap needs at least 2 instruments, got {n}")
    order = cluster_order(r)
    names = tuple(symbols[i] for i in order)
    figure = matrix_figure(names, names, r[np.ix_(order, order)], title=title)
    return _to_image(figure), names


def cross_heatmap_chart(
    row_symbols: Sequence[str], column_symbols: Sequence[str], matrix: CorrMatrix, *,
    title: str = "",
) -> ChartImage:
    """Draw the correlations between two groups (rows one group, columns the other).

    Parameters
    ----------
    row_symbols, column_symbols : sequence of str, lengths R and C (both at least 1)
        The two groups' instruments, in the desk's order.
    matrix : ndarray, shape (R, C)
        Correlation of each row instrument with each column instrument; NaN left white.
    title : str
        Short title above the plot.

    Returns
    -------
    ChartImage
        The rectangle drawn by `matrix_figure`, rows and columns as given.
    """
    if not row_symbols or not column_symbols:
        raise ValueError("a cross-group matrix needs at least one instrument on each side")
    return _to_image(matrix_figure(row_symbols, column_symbols, matrix, title=title))


def group_average_chart(
    dates: Sequence[date] | npt.NDArray[np.datetime64],
    values: Sequence[float] | Float1D,
    *,
    title: str = "",
) -> ChartImage:
    """Draw a small history of a group's average pairwise correlation.

    Parameters
    ----------
    dates : sequence of date, shape (T,)
        Business days, ascending.
    values : array_like, shape (T,)
        Average pairwise correlation per day; NaN leaves a gap.
    title : str
        Short title above the plot.

    Returns
    -------
    ChartImage
        A 3.2 x 1.2 inch chart (640 x 240 pixels, displayed at 320 x 120).
    """
    x = _as_dates(dates)
    y = _as_float(values)
    if x.shape != y.shape:
        raise ValueError(f"history arrays differ in length: dates {x.shape}, values {y.shape}")
    figure = _figure(3.2, 1.2)
    axes = figure.add_axes((0.13, 0.2, 0.84, 0.62))
    _style_axes(axes)
    if x.size:
        axes.plot(x, y, color=LINE, linewidth=1.0)
        locator = chart_axes.date_locator(4)
        axes.xaxis.set_major_locator(locator)
        axes.xaxis.set_major_formatter(chart_axes.date_formatter(locator))
        if np.isfinite(y).any():
            axes.set_ylim(*chart_axes.value_limits((y,)))
    axes.tick_params(labelsize=6)
    if title:
        figure.text(0.13, 0.88, title, fontsize=7, color=INK)
    return _to_image(figure)
