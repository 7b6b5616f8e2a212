"""Where each window starts and ends, and the row blocks handed to the kernels.

The trailing window of day ``t`` (a row of the returns matrix) with length ``W`` is rows
``t - W + 1 .. t``; before row ``W - 1`` it is cut at row 0 and is shorter. This module
computes those bounds, the chunks a stream walks through, the per-instrument shift that
centres a block before sums are taken, and the (days, instruments, W) stacks of window
rows (window axis last, so that every per-day product is one row-major BLAS call). It
computes nothing inside a window.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from monitor._typing import Returns2D
from monitor.engine.layout import BoolArray, FloatArray, IntArray

DEFAULT_CHUNK_BYTES = 48 * 2**20
"""Working memory a chunk of days aims at; chunks shrink for wide tiles."""
MAX_CHUNK_DAYS = 64


def window_bounds(t: int, window: int) -> tuple[int, int]:
    """First row and one past the last row of day ``t``'s trailing window (cut at row 0)."""
    return max(0, t - window + 1), t + 1


def chunks(start: int, stop: int, size: int) -> Iterator[tuple[int, int]]:
    """Consecutive ``[a, b)`` day ranges covering ``[start, stop)``, each at most ``size``."""
    for a in range(start, stop, size):
        yield a, min(a + size, stop)


def chunk_days(
    pair_count: int, columns: int, window: int, chunk: int | None, *, pair_arrays: int = 2
) -> int:
    """Days per chunk so that a chunk's arrays stay near :data:`DEFAULT_CHUNK_BYTES`.

    Parameters
    ----------
    pair_count : int
        Output entries per day (I * J for a tile, P for a pair list).
    columns : int
        Instrument columns gathered per day on both sides.
    window : int
        Rows per window held per day (a stack of windows), or 2 for running sums.
    chunk : int or None
        Caller's choice; used as given when not None.
    pair_arrays : int
        Arrays of ``pair_count`` entries a chunk holds per day.
    """
    if chunk is not None:
        return max(1, int(chunk))
    per_day = 8 * (pair_arrays * pair_count + 6 * window * columns) + 1
    return int(max(1, min(MAX_CHUNK_DAYS, DEFAULT_CHUNK_BYTES // per_day)))


def column_shift(block: Returns2D) -> FloatArray:
    """Per-instrument centre of a block of returns: the mean of its valid values, 0 if none.

    Sums of squares are taken of ``returns - shift``; with the shift near the data, the
    one-pass moment formulas lose no accuracy to a large common offset.

    Parameters
    ----------
    block : (rows, K) float array, NaN = missing

    Returns
    -------
    (K,) float array
    """
    valid = ~np.isnan(block)
    counts = valid.sum(axis=0)
    totals = np.where(valid, block, 0.0).sum(axis=0)
    return np.divide(totals, counts, out=np.zeros(block.shape[1]), where=counts > 0)


def window_stack(returns: Returns2D, columns: IntArray, a: int, b: int, window: int) -> FloatArray:
    """Rows of the trailing windows of days ``a .. b-1`` for the given instrument columns.

    Parameters
    ----------
    returns : (T, N) float array
    columns : (K,) int array
        Instrument columns to gather (may repeat, as in a pair list).
    a, b : int
        Day range; ``0 <= a < b <= T``.
    window : int
        Window length W.

    Returns
    -------
    (b - a, K, W) float array, C-contiguous
        ``out[c, :, k]`` is row ``a + c - W + 1 + k``; rows before 0 are NaN (missing), so
        the windows of the first days are shorter, exactly as a window cut at row 0.
    """
    first = a - window + 1
    block = returns[max(0, first) : b][:, columns]
    if first < 0:
        pad = np.full((-first, block.shape[1]), np.nan)
        block = np.concatenate([pad, block], axis=0)
    return np.array(sliding_window_view(block, window, axis=0), order="C")


def delta_stack(returns: Returns2D, columns: IntArray, a: int, b: int, window: int) -> FloatArray:
    """The row entering and the row leaving the window, for days ``a + 1 .. b - 1``.

    Parameters
    ----------
    returns : (T, N) float array
    columns : (K,) int array
    a, b : int
        Day range of a chunk; day ``a`` is its anchor (computed from its whole window).
    window : int

    Returns
    -------
    (b - a - 1, K, 2) float array
        ``out[c, :, 0]`` is row ``t = a + 1 + c`` and ``out[c, :, 1]`` row ``t - W`` (NaN
        before row 0). With row weights ``(+1, -1)`` the window sums of day ``t`` are those
        of day ``t - 1`` plus these sums.
    """
    days = b - a - 1
    out = np.full((days, columns.size, 2), np.nan)
    if days <= 0:
        return out
    out[:, :, 0] = returns[a + 1 : b][:, columns]
    first_old = a + 1 - window
    lo = max(0, first_old)
    if lo < b - window:
        out[lo - first_old :, :, 1] = returns[lo : b - window][:, columns]
    return out


def _sliding(reduce: np.ufunc, block: Returns2D, window: int) -> Returns2D:
    """``reduce`` (fmax or fmin) over every run of ``window`` rows, by doubling.

    After k rounds ``acc[s]`` covers rows ``s .. s + 2**k - 1``; two overlapping runs then
    cover any length. ``log2(W)`` whole-array passes instead of W.
    """
    acc = block
    span = 1
    while 2 * span <= window:
        acc = reduce(acc[:-span], acc[span:])
        span *= 2
    rest = window - span
    return reduce(acc[: acc.shape[0] - rest], acc[rest:])


def flat_columns(returns: Returns2D, columns: IntArray, a: int, b: int, window: int) -> BoolArray:
    """Instruments whose valid returns are all equal over the window of days ``a .. b-1``.

    An exact test (largest == smallest), independent of any running sum: a stale close
    after large moves leaves running sums with rounding residue far above the true zero
    variance, so zero variance is detected here and not from the sums.

    Returns
    -------
    (b - a, K) bool array
        False for a window with no valid return.
    """
    first = a - window + 1
    block = returns[max(0, first) : b][:, columns]
    if first < 0:
        block = np.concatenate([np.full((-first, block.shape[1]), np.nan), block], axis=0)
    # fmax/fmin skip NaN without the all-NaN warning of nanmax
    return _sliding(np.fmax, block, window) == _sliding(np.fmin, block, window)
