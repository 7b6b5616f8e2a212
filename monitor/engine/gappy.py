"""Rolling Pearson of a tile whose windows have gaps: running matrix sums, no per-pair path.

With ``M`` the 0/1 mask of present returns in the window (rows = days), ``G = 1 - M`` the
gaps, ``X`` the shifted returns with zeros at gaps and ``Q = X * X``, every pair's sums over
its common days are matrix products of the window rows:

* count ``n = M'M``, partial sums ``X'M`` and ``M'X``, partial squares ``Q'M`` and ``M'Q``,
  cross products ``X'X`` (a zero at a gap removes that day from every product with it).

Gaps are few (holidays, a feed's missing day), so the sums are kept as each instrument's
own window totals minus what the other side's gaps take away: ``M'M = n_own - G'M``,
``M'X = x_own - G'X``, ``M'Q = q_own - G'Q``. Each day one row enters and one leaves; the
own totals are vectors, the gap terms change only in the rows of the instruments with a gap
in the entering or leaving row (a handful of rows of the tile), and ``X'X`` gets the dense
rank-two update of a clean panel. Nothing is done per pair in Python and no pair goes down
another path. Per day and pair that is about a dozen cache-resident array operations: the
correlation ``(n Sxy - Sx Sy) / sqrt((n Sxx - Sx^2)(n Syy - Sy^2))``, the count and the
checks.

Precision: the sums are taken of returns minus a per-instrument shift (the mean of the
chunk where the sums were anchored), so the one-pass formulas lose no digits to a common
offset. They are carried from chunk to chunk and re-anchored (recomputed exactly from the
window rows) after :data:`REANCHOR_DAYS` days, when the squares taken in and out since the
anchor exceed :data:`REANCHOR_RATIO` times an instrument's current window's (a burst of
large moves has left), or when an instrument's mean has moved far from the shift
(:data:`SHIFT_SLACK`). Returns are clipped to +-``RETURN_LIMIT`` before any sum
(:func:`monitor.engine.stream.as_returns`), so no product can overflow.

Zero variance: an instrument whose own window values are all equal (an exact test,
largest == smallest, :func:`monitor.engine.windows.flat_columns`) and a pair whose variance
on its common days is at most :data:`monitor.engine.kernels.STALE_RATIO` of the raw second
moment are stale (NaN value, ``stale`` True when the count suffices).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from monitor._typing import Returns2D
from monitor.engine.kernels import STALE_RATIO, constant
from monitor.engine.layout import BoolArray, FloatArray, IntArray, TileLayout
from monitor.engine.windows import column_shift, flat_columns

DayArrays = tuple[FloatArray, FloatArray, BoolArray]


def _side_block(
    returns: Returns2D, columns: IntArray, shift: FloatArray, first: int, b: int
) -> tuple[FloatArray, FloatArray]:
    """Rows ``first .. b-1`` of the columns: (mask, shifted returns zero at gaps).

    Rows before 0 are missing (the windows of the first days are cut at row 0).
    """
    block = returns[max(0, first) : b][:, columns]
    if first < 0:
        block = np.concatenate([np.full((-first, columns.size), np.nan), block], axis=0)
    mask = ~np.isnan(block)
    values = np.where(mask, block - shift[columns], 0.0)
    return mask.astype(np.float64), values


REANCHOR_DAYS = 256
"""Most days between two exact anchors of the running sums."""
REANCHOR_RATIO = 10.0
"""Re-anchor when the squares an instrument's running sums have taken in and out since the
anchor exceed this many times its current window's (as in :mod:`monitor.engine.rolling`):
the rounding they leave then stays below about ``4 * 10 * 2.2e-16`` of the sums."""
SHIFT_SLACK = 1e4
"""Keep the anchor's shift while ``(chunk mean - shift)^2 <= SHIFT_SLACK * variance`` for
every instrument: the one-pass formulas then lose at most ``1e4 * 2.2e-16 ~ 2e-12`` of a
variance to the offset; beyond it, a fresh anchor takes the chunk's mean as its shift."""


@dataclass
class GappyState:
    """The running sums of one tile, carried from chunk to chunk (one shift per anchor)."""

    day: int
    anchored: int
    shift: FloatArray
    gap_count: FloatArray
    gap_right_x: FloatArray
    gap_right_q: FloatArray
    gap_left_x: FloatArray
    gap_left_q: FloatArray
    cross: FloatArray
    absorbed_left: FloatArray
    absorbed_right: FloatArray


class _Side:
    """One side of the tile over a chunk: rows ``a - W .. b - 1`` (row c is the one leaving
    on day ``a + c``, row ``c + W`` the one entering), own window totals per day."""

    def __init__(
        self, returns: Returns2D, columns: IntArray, shift: FloatArray, a: int, b: int, window: int
    ) -> None:
        days = b - a
        self.mask, self.x = _side_block(returns, columns, shift, a - window, b)
        self.q = self.x * self.x
        # own totals of every day of the chunk: day a's window, then entering minus leaving
        self.count = _running(self.mask, window, days)
        self.total = _running(self.x, window, days)
        self.squares = _running(self.q, window, days)
        rows, cols = np.nonzero(self.mask < 1.0)
        self.gaps = np.split(cols, np.searchsorted(rows, np.arange(1, self.mask.shape[0])))

    def absorbed(self, first: int, days: int, window: int, start: FloatArray) -> FloatArray:
        """(days, K): squares taken in and out since the anchor, after each day's update
        (``start`` before day 0; days before ``first`` are not updates)."""
        taken = np.zeros((days, self.q.shape[1]))
        taken[first:] = self.q[first + window : days + window] + self.q[first:days]
        return start + np.cumsum(taken, axis=0)

    def over(self, taken: FloatArray) -> BoolArray:
        """(days,): some instrument's running sums have taken in more than REANCHOR_RATIO
        times its current window's squares (a constant or empty window has no scale), or
        its window mean has moved further from the shift than SHIFT_SLACK allows."""
        squares = self.squares
        count = np.maximum(self.count, 1.0)
        mean = self.total / count  # about the shift
        variance = np.maximum(squares / count - mean * mean, 0.0)
        bad = (taken > REANCHOR_RATIO * squares) & (squares > 0)
        # (an instrument without variance in its window gives NaN whatever its sums)
        moving = variance > STALE_RATIO * squares / count
        bad |= (mean * mean > SHIFT_SLACK * variance) & moving
        return np.asarray(bad.any(axis=1))


def _running(rows: FloatArray, window: int, days: int) -> FloatArray:
    steps = np.concatenate(
        [rows[1 : window + 1].sum(axis=0)[None], rows[window + 1 : window + days] - rows[1:days]]
    )
    return np.cumsum(steps, axis=0)


def _keeps(state: GappyState | None, a: int, sides: list[_Side]) -> bool:
    """Whether the carried sums serve day ``a`` (else a fresh anchor is taken)."""
    if state is None or state.day != a - 1 or a - state.anchored >= REANCHOR_DAYS:
        return False
    absorbed = [state.absorbed_left, state.absorbed_right]
    for side, taken in zip(sides, absorbed, strict=False):
        squares = side.squares[0]
        if np.any((taken > REANCHOR_RATIO * squares) & (squares > 0)):
            return False
        # the chunk's variance about its own mean against the offset of the kept shift
        count = np.maximum(side.count[0], 1.0)
        mean = side.total[0] / count  # about the kept shift
        variance = np.maximum(squares / count - mean * mean, 0.0)
        moving = variance > STALE_RATIO * squares / count
        if np.any((mean * mean > SHIFT_SLACK * variance) & moving):
            return False
    return True


def gappy_days(
    returns: Returns2D,
    layout: TileLayout,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
    min_count: int,
    carry: list[GappyState | None] | None = None,
) -> Iterator[DayArrays]:
    """Pairwise-complete rolling Pearson of a tile for days ``a .. b-1``.

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    layout : TileLayout (symmetric or not)
    shift : (N,) float array
        Per-instrument centre subtracted before the sums when an anchor is taken (the
        chunk's mean); carried sums keep their anchor's shift.
    a, b : int
        Days. The sums of day ``a`` come from the previous chunk's (``carry``) plus one
        update, or from an exact anchor on its window rows; later days are updated.
    window : int
        Window length; windows before row ``window - 1`` are cut at row 0.
    min_count : int
        Pairs with fewer common days get NaN (not stale).
    carry : one-element list holding the state from the previous chunk (or None); updated
        in place for the next chunk. None: no carrying.

    Yields
    ------
    (value, n, stale) per day, arrays of ``layout.shape``.
    """
    symmetric = layout.symmetric
    state = carry[0] if carry else None
    kept_shift = state.shift if state is not None else shift
    left = _Side(returns, layout.rows, kept_shift, a, b, window)
    right = left if symmetric else _Side(returns, layout.cols, kept_shift, a, b, window)
    if not _keeps(state, a, [left] if symmetric else [left, right]):
        # the anchor's shift: each instrument's mean over day a's window
        shift = np.array(shift)
        columns = np.union1d(layout.rows, layout.cols)
        shift[columns] = column_shift(returns[max(0, a - window + 1) : a + 1][:, columns])
        state = _anchor(returns, layout, shift, a, b, window)
        left = _Side(returns, layout.rows, shift, a, b, window)
        right = left if symmetric else _Side(returns, layout.cols, shift, a, b, window)
        first_update = 1
    else:
        first_update = 0
    assert state is not None
    days = b - a
    # the first day whose running sums would hold too much rounding: stop before it and
    # take a fresh anchor there
    taken_left = left.absorbed(first_update, days, window, state.absorbed_left)
    over = left.over(taken_left)
    taken_right = taken_left
    if not symmetric:
        taken_right = right.absorbed(first_update, days, window, state.absorbed_right)
        over |= right.over(taken_right)
    hits = np.flatnonzero(over)
    if hits.size:
        stop = int(hits[0])  # 0 only for carried sums: then anchor on day a itself
        if stop:
            yield from _days(
                left, right, layout, state, a, a + stop, window, min_count, first_update, returns
            )
        if carry is not None:
            carry[0] = None
        yield from gappy_days(returns, layout, shift, a + stop, b, window, min_count, carry)
        return
    state.absorbed_left = taken_left[-1]
    state.absorbed_right = taken_right[-1]
    if carry is not None:
        carry[0] = state
    yield from _days(left, right, layout, state, a, b, window, min_count, first_update, returns)


def _days(
    left: _Side,
    right: _Side,
    layout: TileLayout,
    state: GappyState,
    a: int,
    b: int,
    window: int,
    min_count: int,
    first_update: int,
    returns: Returns2D,
) -> Iterator[DayArrays]:
    """Days ``a .. b - 1`` from the state of day ``a - 1`` (or day ``a`` when
    ``first_update`` is 1), the sides' rows starting at day ``a``."""
    symmetric = layout.symmetric
    days = b - a
    flat_left = flat_columns(returns, layout.rows, a, b, window)
    flat_right = flat_left if symmetric else flat_columns(returns, layout.cols, a, b, window)
    shape = layout.shape
    gap_count, cross = state.gap_count, state.cross
    gap_right_x, gap_right_q = state.gap_right_x, state.gap_right_q
    gap_left_x, gap_left_q = state.gap_left_x, state.gap_left_q
    # the rank-two updates of the cross products for every day of the chunk: one product
    updates = None
    if first_update < days:
        steps = np.arange(first_update, days)
        updates = layout.cross(
            np.stack([left.x[steps + window], left.x[steps]], axis=2),
            np.stack([right.x[steps + window], -right.x[steps]], axis=2),
        )
    state.day = -1  # until the last day is done
    buffers = _Buffers(shape, symmetric)
    no_stale = constant(False, shape, np.bool_)
    enough_floor = min_count * (1.0 - 1e-12)
    for c in range(days):
        if c >= first_update:
            enter, leave = c + window, c
            _gap_rows(gap_count, right.mask, left.gaps, enter, leave)
            _gap_rows(gap_right_x, right.x, left.gaps, enter, leave)
            _gap_rows(gap_right_q, right.q, left.gaps, enter, leave)
            if not symmetric:
                _gap_rows(gap_left_x, left.x, right.gaps, enter, leave)
                _gap_rows(gap_left_q, left.q, right.gaps, enter, leave)
            assert updates is not None
            cross += updates[c - first_update]
        # n_ij = own count of j minus the days i misses (rows of gap_count: i's gaps)
        n = np.subtract(right.count[c][None, :], gap_count)
        sum_right = np.subtract(right.total[c][None, :], gap_right_x, out=buffers.sum_right)
        raw_right = np.subtract(right.squares[c][None, :], gap_right_q, out=buffers.raw_right)
        raw_right *= n  # n * Syy
        square = np.multiply(sum_right, sum_right, out=buffers.square)
        var_right = np.subtract(raw_right, square, out=square)  # n * Syy - Sy^2
        if symmetric:
            sum_left, raw_left, var_left = sum_right.T, raw_right.T, var_right.T
        else:
            sum_left = np.subtract(left.total[c][:, None], gap_left_x.T, out=buffers.sum_left)
            raw_left = np.subtract(left.squares[c][:, None], gap_left_q.T, out=buffers.raw_left)
            raw_left *= n
            var_left = np.multiply(sum_left, sum_left, out=buffers.var_left)
            np.subtract(raw_left, var_left, out=var_left)
        # a pair is flat when its variance is at most STALE_RATIO of the raw moment; one
        # comparison of the extremes rules that out on almost every day
        tiny = None
        moving = _clearly_moving(var_right, raw_right)
        if not moving:
            tiny = var_right <= STALE_RATIO * raw_right
        if not symmetric and not _clearly_moving(var_left, raw_left):
            moving = False
            tiny_left = var_left <= STALE_RATIO * raw_left
            tiny = tiny_left if tiny is None else tiny | tiny_left
        elif symmetric and tiny is not None:
            tiny = tiny | tiny.T
        value = np.multiply(n, cross)
        # n * Sxy - Sx * Sy (the raw moments are not needed any more: reuse their buffer)
        value -= np.multiply(sum_left, sum_right, out=buffers.raw_right)
        # (n * Sxx - Sx^2) * (n * Syy - Sy^2), in the buffer of the sums (no longer needed)
        scale = np.multiply(var_right, var_left, out=buffers.sum_left if not symmetric else
                            buffers.sum_right)
        if moving:  # every variance is positive
            np.sqrt(scale, out=scale)
            value /= scale
        else:
            with np.errstate(divide="ignore", invalid="ignore"):
                np.sqrt(scale, out=scale)
                value /= scale
        np.clip(value, -1.0, 1.0, out=value)
        flat = _flat_pairs(tiny, flat_left[c], flat_right[c], shape)
        # n_ij >= own count of i + own count of j - W: skip the check when that suffices
        least = left.count[c].min() + right.count[c].min() - window
        enough = None if least >= enough_floor else n >= enough_floor
        if flat is not None:
            stale = flat if enough is None else flat & enough
            value[flat] = np.nan
        else:
            stale = no_stale
        if enough is not None:
            value[~enough] = np.nan
        if c == days - 1:
            state.day = b - 1
        yield value, n, stale


def _anchor(
    returns: Returns2D, layout: TileLayout, shift: FloatArray, a: int, b: int, window: int
) -> GappyState:
    """Exact sums of day ``a`` from its window rows (rows of the gap terms: the instrument
    whose gaps remove the days)."""
    first = a - window + 1
    left_mask, left_x = _side_block(returns, layout.rows, shift, first, a + 1)
    if layout.symmetric:
        right_mask, right_x = left_mask, left_x
    else:
        right_mask, right_x = _side_block(returns, layout.cols, shift, first, a + 1)
    right_q = right_x * right_x
    cols = layout.shape[1]
    by_left_gaps = (1.0 - left_mask).T @ np.concatenate([right_mask, right_x, right_q], axis=1)
    # contiguous copies: each is read whole every day
    gap_count = np.array(by_left_gaps[:, :cols])  # (I, J): common days the left's gaps remove
    gap_right_x = np.array(by_left_gaps[:, cols : 2 * cols])  # G_L' X_R
    gap_right_q = np.array(by_left_gaps[:, 2 * cols :])  # G_L' Q_R
    if layout.symmetric:
        gap_left_x, gap_left_q = gap_right_x, gap_right_q  # (J, I) = the same matrices
    else:
        rows = layout.shape[0]
        by_right_gaps = (1.0 - right_mask).T @ np.concatenate([left_x, left_x * left_x], axis=1)
        gap_left_x = np.array(by_right_gaps[:, :rows])  # (J, I): G_R' X_L
        gap_left_q = np.array(by_right_gaps[:, rows:])
    return GappyState(
        day=a,
        anchored=a,
        shift=shift,
        gap_count=gap_count,
        gap_right_x=gap_right_x,
        gap_right_q=gap_right_q,
        gap_left_x=gap_left_x,
        gap_left_q=gap_left_q,
        cross=left_x.T @ right_x,
        absorbed_left=np.zeros(layout.shape[0]),
        absorbed_right=np.zeros(layout.shape[1]),
    )


class _Buffers:
    """Work arrays of one tile, reused every day (only the outputs are fresh arrays)."""

    def __init__(self, shape: tuple[int, ...], symmetric: bool) -> None:
        self.sum_right = np.empty(shape)
        self.raw_right = np.empty(shape)
        self.square = np.empty(shape)
        if not symmetric:
            self.sum_left = np.empty(shape)
            self.raw_left = np.empty(shape)
            self.var_left = np.empty(shape)


def _clearly_moving(variance: FloatArray, raw: FloatArray) -> bool:
    """True when no pair's variance can be within STALE_RATIO of its raw moment."""
    return bool(variance.min() > STALE_RATIO * raw.max())


def _flat_pairs(
    tiny: BoolArray | None, flat_left: BoolArray, flat_right: BoolArray, shape: tuple[int, ...]
) -> BoolArray | None:
    """Pairs with a flat side: tiny variance on the common days, or an instrument whose own
    window values are all equal; None when there is none."""
    rows_flat, cols_flat = bool(flat_left.any()), bool(flat_right.any())
    if tiny is None and not rows_flat and not cols_flat:
        return None
    flat = np.zeros(shape, dtype=bool) if tiny is None else tiny
    if rows_flat:
        flat[flat_left, :] = True
    if cols_flat:
        flat[:, flat_right] = True
    return flat if flat.any() else None


def _gap_rows(
    terms: FloatArray, values: FloatArray, gaps: list[IntArray], enter: int, leave: int
) -> None:
    """Add the entering row's values to the rows of instruments missing on it; take the
    leaving row's values from the rows of instruments missing on that one."""
    rows = gaps[enter]
    if rows.size:
        terms[rows] += values[enter]
    rows = gaps[leave]
    if rows.size:
        terms[rows] -= values[leave]
