"""EWMA correlation (``mean=weighted``) of a tile with gaps: running matrix sums of weights.

The same sums as the rolling path (:mod:`monitor.engine.gappy`), with the weight of row s
``lam^(t - s)`` on the pair's common days: counts become the weight total ``W0 = M'wM`` (and
``W2 = M'w^2M`` for the Kish count ``W0^2 / W2``), partial sums ``X'wM``, partial squares
``Q'wM``, cross products ``X'wX``. Each is kept as each instrument's own weighted total
minus what the other side's gaps take away, so a day updates the rows of the instruments
missing on it, and ``X'wX`` gets one rank-one update. Nothing leaves a window, so nothing is
ever subtracted: the rounding of old updates decays with their weights.

Weights are stored growing, ``g_s = lam^-(s - base)``: the sums of a day are the true sums
times a common factor, which cancels in the correlation and in the Kish count, so no array
is rescaled per day. When ``g`` would pass :data:`GROWTH_LIMIT` every sum is multiplied
back (a rebase) and ``base`` moves.

As the per-pair recursion it replaces (:mod:`monitor.engine.ewma`): pandas'
``ewm(halflife=H, adjust=True, ignore_na=False).corr()`` weights, returns shifted by each
instrument's mean over the rows used, a warm start from the closed form over
``truncation_rows`` rows, the minimum on the Kish count, and a side stale when its weighted
variance on the common days is at most :data:`monitor.engine.kernels.STALE_RATIO` of its
raw second moment.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from monitor._typing import Returns2D
from monitor.engine.kernels import STALE_RATIO, constant
from monitor.engine.layout import BoolArray, FloatArray, IntArray, TileLayout
from monitor.engine.windows import column_shift

DayArrays = tuple[FloatArray, FloatArray, BoolArray]

GROWTH_LIMIT = 1e40
"""Largest stored weight before a rebase (its square, for the Kish sums, stays far from
overflow)."""
CHUNK_BYTES = 24 * 2**20
"""Memory of a chunk's batched rank-one updates."""


class _Side:
    """Mask, shifted returns (zero at gaps) and squares of one side, rows ``lo .. stop-1``."""

    def __init__(
        self, returns: Returns2D, columns: IntArray, shift: FloatArray, lo: int, stop: int
    ) -> None:
        block = returns[lo:stop][:, columns]
        present = ~np.isnan(block)
        self.mask = present.astype(np.float64)
        self.x = np.where(present, block - shift[columns], 0.0)
        self.q = self.x * self.x
        rows, cols = np.nonzero(~present)
        self.gaps = np.split(cols, np.searchsorted(rows, np.arange(1, block.shape[0])))

    def own(self, weights: FloatArray, rows: slice) -> list[FloatArray]:
        """Own weighted totals over ``rows``: weight, squared weight, sum, sum of squares."""
        return [
            weights @ self.mask[rows],
            (weights * weights) @ self.mask[rows],
            weights @ self.x[rows],
            weights @ self.q[rows],
        ]


def ewma_gappy_days(
    returns: Returns2D,
    layout: TileLayout,
    lam: float,
    min_count: int,
    start: int,
    stop: int,
    lo: int,
) -> Iterator[DayArrays]:
    """EWMA (weighted mean) correlation of a tile for rows ``start .. stop-1``.

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    layout : TileLayout
    lam : float
        Decay per row.
    min_count : int
        Pairs whose Kish count is below this get NaN (not stale).
    start, stop : int
        Rows to yield.
    lo : int
        First row of the warm start (rows ``lo .. start-1`` give the sums of ``start - 1``).
    """
    symmetric = layout.symmetric
    columns = np.union1d(layout.rows, layout.cols)
    shift = np.zeros(returns.shape[1])
    shift[columns] = column_shift(returns[lo:stop][:, columns])
    left = _Side(returns, layout.rows, shift, lo, stop)
    right = left if symmetric else _Side(returns, layout.cols, shift, lo, stop)
    shape = layout.shape
    history = slice(0, start - lo)
    base = start - 1
    weights = lam ** (base - np.arange(lo, start, dtype=np.float64))
    # gap terms, rows = the instrument whose gaps remove the days
    gap_left = (1.0 - left.mask[history]).T * weights
    gap_count = gap_left @ right.mask[history]
    gap_count2 = (gap_left * weights) @ right.mask[history]
    gap_right_x = gap_left @ right.x[history]
    gap_right_q = gap_left @ right.q[history]
    if symmetric:
        gap_left_x, gap_left_q = gap_right_x, gap_right_q
    else:
        gap_right = (1.0 - right.mask[history]).T * weights
        gap_left_x = gap_right @ left.x[history]
        gap_left_q = gap_right @ left.q[history]
    cross = (left.x[history].T * weights) @ right.x[history]
    own_right = right.own(weights, history)
    own_left = own_right if symmetric else left.own(weights, history)
    matrices = [gap_count, gap_right_x, gap_right_q, cross]
    squared = [gap_count2]
    if not symmetric:
        matrices += [gap_left_x, gap_left_q]
    sums = [gap_count, gap_count2, gap_right_x, gap_right_q, gap_left_x, gap_left_q, cross]
    buffers = _Buffers(shape, symmetric)
    no_stale = constant(False, shape, np.bool_)
    enough_floor = min_count * (1.0 - 1e-12)
    size = max(1, min(64, CHUNK_BYTES // (8 * int(np.prod(shape)) + 1)))
    log_growth = -np.log(lam)
    for a in range(start, stop, size):
        b = min(stop, a + size)
        if (b - 1 - base) * log_growth > np.log(GROWTH_LIMIT):
            # rebase: true sums of row a - 1 times lam^-(a - 1 - new base) = 1
            factor = lam ** (a - 1 - base)
            for array in matrices + own_left[:1] + own_left[2:]:
                array *= factor
            for array in squared + own_left[1:2]:
                array *= factor * factor
            if not symmetric:
                for k, array in enumerate(own_right):
                    array *= factor * factor if k == 1 else factor
            base = a - 1
        g = lam ** (base - np.arange(a, b, dtype=np.float64))
        rows = np.arange(a, b) - lo
        updates = layout.cross(
            (left.x[rows] * g[:, None])[:, :, None], right.x[rows][:, :, None]
        )
        for c in range(b - a):
            k = rows[c]
            w = g[c]
            _gap_rows(gap_count, right.mask[k], left.gaps[k], w)
            _gap_rows(gap_count2, right.mask[k], left.gaps[k], w * w)
            _gap_rows(gap_right_x, right.x[k], left.gaps[k], w)
            _gap_rows(gap_right_q, right.q[k], left.gaps[k], w)
            if not symmetric:
                _gap_rows(gap_left_x, left.x[k], right.gaps[k], w)
                _gap_rows(gap_left_q, left.q[k], right.gaps[k], w)
            for side, own in ((right, own_right),) if symmetric else (
                (right, own_right), (left, own_left)
            ):
                own[0] += w * side.mask[k]
                own[1] += (w * w) * side.mask[k]
                own[2] += w * side.x[k]
                own[3] += w * side.q[k]
            cross += updates[c]
            yield _day(sums, own_left, own_right, symmetric, enough_floor, no_stale, buffers)


class _Buffers:
    """Work arrays reused every day (the outputs are fresh arrays)."""

    def __init__(self, shape: tuple[int, ...], symmetric: bool) -> None:
        self.weight2 = np.empty(shape)
        self.positive = np.empty(shape, dtype=bool)
        self.sum_right = np.empty(shape)
        self.raw_right = np.empty(shape)
        self.var_right = np.empty(shape)
        self.square = np.empty(shape)
        if not symmetric:
            self.sum_left = np.empty(shape)
            self.raw_left = np.empty(shape)
            self.var_left = np.empty(shape)


def _day(
    sums: list[FloatArray],
    own_left: list[FloatArray],
    own_right: list[FloatArray],
    symmetric: bool,
    enough_floor: float,
    no_stale: BoolArray,
    buffers: _Buffers,
) -> DayArrays:
    """One day's values, Kish counts and stale flags from the sums."""
    gap_count, gap_count2, gap_right_x, gap_right_q, gap_left_x, gap_left_q, cross = sums
    weight = np.subtract(own_right[0][None, :], gap_count)
    weight2 = np.subtract(own_right[1][None, :], gap_count2, out=buffers.weight2)
    n = np.multiply(weight, weight)
    np.divide(n, weight2, out=n, where=np.greater(weight2, 0.0, out=buffers.positive))
    sum_right = np.subtract(own_right[2][None, :], gap_right_x, out=buffers.sum_right)
    raw_right = np.subtract(own_right[3][None, :], gap_right_q, out=buffers.raw_right)
    raw_right *= weight
    var_right = np.multiply(sum_right, sum_right, out=buffers.var_right)
    np.subtract(raw_right, var_right, out=var_right)
    if symmetric:
        sum_left, raw_left, var_left = sum_right.T, raw_right.T, var_right.T
    else:
        sum_left = np.subtract(own_left[2][:, None], gap_left_x.T, out=buffers.sum_left)
        raw_left = np.subtract(own_left[3][:, None], gap_left_q.T, out=buffers.raw_left)
        raw_left *= weight
        var_left = np.multiply(sum_left, sum_left, out=buffers.var_left)
        np.subtract(raw_left, var_left, out=var_left)
    # one comparison of the extremes rules out a flat side on almost every day
    flat = None
    moving = bool(var_right.min() > STALE_RATIO * raw_right.max())
    if not symmetric:
        moving = moving and bool(var_left.min() > STALE_RATIO * raw_left.max())
    if not moving:
        flat = (var_right <= STALE_RATIO * raw_right) | (var_left <= STALE_RATIO * raw_left)
    value = np.multiply(weight, cross)
    value -= np.multiply(sum_left, sum_right, out=buffers.square)
    scale = np.multiply(var_left, var_right, out=buffers.square)
    if moving:
        np.sqrt(scale, out=scale)
        value /= scale
    else:
        with np.errstate(divide="ignore", invalid="ignore"):
            np.sqrt(scale, out=scale)
            value /= scale
    np.clip(value, -1.0, 1.0, out=value)
    enough = None if n.min() >= enough_floor else n >= enough_floor
    stale: BoolArray = no_stale
    if flat is not None and flat.any():
        stale = flat if enough is None else flat & enough
        value[flat] = np.nan
    if enough is not None:
        value[~enough] = np.nan
    return value, n, stale


def _gap_rows(terms: FloatArray, values: FloatArray, rows: IntArray, weight: float) -> None:
    """Add the row's weighted values to the rows of the instruments missing on it."""
    if rows.size:
        terms[rows] += weight * values
