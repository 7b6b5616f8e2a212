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

Precision: the sums are taken of returns minus each instrument's mean over the chunk (the
shift), so the one-pass formulas lose no digits to a common offset, and they are re-anchored
(recomputed from the window rows) at the start of every chunk of at most
:data:`ANCHOR_DAYS` days, so the rounding of the running updates never accumulates over a
long history. Returns are clipped to +-``RETURN_LIMIT`` before any sum
(:func:`monitor.engine.stream.as_returns`), so no product can overflow.

Zero variance: an instrument whose own window values are all equal (an exact test,
largest == smallest, :func:`monitor.engine.windows.flat_columns`) and a pair whose variance
on its common days is at most :data:`monitor.engine.kernels.STALE_RATIO` of the raw second
moment are stale (NaN value, ``stale`` True when the count suffices).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from monitor._typing import Returns2D
from monitor.engine.kernels import STALE_RATIO, constant
from monitor.engine.layout import BoolArray, FloatArray, IntArray, TileLayout
from monitor.engine.windows import flat_columns

DayArrays = tuple[FloatArray, FloatArray, BoolArray]

ANCHOR_DAYS = 64
"""Most days between two exact anchors of the running sums (one chunk)."""


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


class _Side:
    """One side of the tile over a chunk: own window totals per day, gap rows per update."""

    def __init__(
        self, returns: Returns2D, columns: IntArray, shift: FloatArray, a: int, b: int, window: int
    ) -> None:
        first = a - window + 1
        self.mask, self.x = _side_block(returns, columns, shift, first, b)
        self.q = self.x * self.x
        self.gap = 1.0 - self.mask
        entering = slice(window, None)
        leaving = slice(0, b - a - 1)
        # own totals of every day of the chunk: anchor, then entering minus leaving rows
        self.count = _running(self.mask, window, entering, leaving)
        self.total = _running(self.x, window, entering, leaving)
        self.squares = _running(self.q, window, entering, leaving)
        self.window = window
        self.gaps = [np.flatnonzero(row) for row in self.mask < 1.0]


def _running(rows: FloatArray, window: int, entering: slice, leaving: slice) -> FloatArray:
    steps = np.concatenate([rows[:window].sum(axis=0)[None], rows[entering] - rows[leaving]])
    return np.cumsum(steps, axis=0)


def gappy_days(
    returns: Returns2D,
    layout: TileLayout,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
    min_count: int,
) -> Iterator[DayArrays]:
    """Pairwise-complete rolling Pearson of a tile for days ``a .. b-1`` (one anchor).

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    layout : TileLayout (symmetric or not)
    shift : (N,) float array
        Per-instrument centre subtracted before the sums (the chunk's mean).
    a, b : int
        Days; day ``a``'s sums are computed from its window rows, later days are updated.
    window : int
        Window length; windows before row ``window - 1`` are cut at row 0.
    min_count : int
        Pairs with fewer common days get NaN (not stale).

    Yields
    ------
    (value, n, stale) per day, arrays of ``layout.shape``.
    """
    symmetric = layout.symmetric
    left = _Side(returns, layout.rows, shift, a, b, window)
    right = left if symmetric else _Side(returns, layout.cols, shift, a, b, window)
    flat_left = flat_columns(returns, layout.rows, a, b, window)
    flat_right = flat_left if symmetric else flat_columns(returns, layout.cols, a, b, window)
    shape = layout.shape
    # anchor: the gap terms of day a from its window rows (rows = gap instrument)
    lo, hi = 0, window
    by_left_gaps = left.gap[lo:hi].T @ np.concatenate(
        [right.mask[lo:hi], right.x[lo:hi], right.q[lo:hi]], axis=1
    )
    cols = shape[1]
    # contiguous copies: each is read whole every day
    gap_count = np.array(by_left_gaps[:, :cols])  # (I, J): common days the left's gaps remove
    gap_right_x = np.array(by_left_gaps[:, cols : 2 * cols])  # G_L' X_R
    gap_right_q = np.array(by_left_gaps[:, 2 * cols :])  # G_L' Q_R
    if symmetric:
        gap_left_x, gap_left_q = gap_right_x, gap_right_q  # (J, I) = the same matrices
    else:
        by_right_gaps = right.gap[lo:hi].T @ np.concatenate([left.x[lo:hi], left.q[lo:hi]], axis=1)
        gap_left_x = np.array(by_right_gaps[:, : shape[0]])  # (J, I): G_R' X_L
        gap_left_q = np.array(by_right_gaps[:, shape[0] :])
    cross = left.x[lo:hi].T @ right.x[lo:hi]
    buffers = _Buffers(shape, symmetric)
    no_stale = constant(False, shape, np.bool_)
    enough_floor = min_count * (1.0 - 1e-12)
    for c in range(b - a):
        if c:
            enter, leave = window - 1 + c, c - 1
            _gap_rows(gap_count, right.mask, left.gaps, enter, leave)
            _gap_rows(gap_right_x, right.x, left.gaps, enter, leave)
            _gap_rows(gap_right_q, right.q, left.gaps, enter, leave)
            if not symmetric:
                _gap_rows(gap_left_x, left.x, right.gaps, enter, leave)
                _gap_rows(gap_left_q, left.q, right.gaps, enter, leave)
            buffers.pair_rows[:, 0] = left.x[enter]
            buffers.pair_rows[:, 1] = left.x[leave]
            buffers.pair_cols[0] = right.x[enter]
            np.negative(right.x[leave], out=buffers.pair_cols[1])
            np.matmul(buffers.pair_rows, buffers.pair_cols, out=buffers.rank_two)
            cross += buffers.rank_two
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
        if not _clearly_moving(var_right, raw_right):
            tiny = var_right <= STALE_RATIO * raw_right
        if not symmetric and not _clearly_moving(var_left, raw_left):
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
        if tiny is None and scale.min() > 0.0:
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
        yield value, n, stale


class _Buffers:
    """Work arrays of one tile, reused every day (only the outputs are fresh arrays)."""

    def __init__(self, shape: tuple[int, ...], symmetric: bool) -> None:
        rows, cols = shape
        self.pair_rows = np.empty((rows, 2))
        self.pair_cols = np.empty((2, cols))
        self.rank_two = np.empty(shape)
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
