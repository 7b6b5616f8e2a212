"""Trailing-window measures (``rolling:W``, ``rank:W``) of one layout, chunk by chunk.

Pearson (``rolling``) keeps running window sums: each chunk of days is anchored on the
full sums of its first day's window (one matrix product), then every following day adds
the row that enters and subtracts the row that leaves. Re-anchoring on every chunk (at
most :data:`~monitor.engine.windows.MAX_CHUNK_DAYS` days) bounds the rounding a running
sum can gather, and the data are centred by each instrument's chunk mean before any sum is
taken, so a large common offset in the returns costs no accuracy. However long the
history, the last window agrees with a two-pass computation to about 1e-14.

Within a chunk, the instruments with a return on every row any of the chunk's windows
touches take the fast path (sums per instrument, one per-pair cross sum); pairs touching
an instrument with a gap take the pairwise-complete masked sums of
:mod:`monitor.engine.kernels`.

Spearman (``rank``) cannot be updated (ranks change with the window), so each window is
ranked and correlated afresh (:mod:`monitor.engine.rank`).

Cost per day, tile I x J: ``O(I * J)`` elementwise work for Pearson (plus one
``O(W * I * J)`` product per chunk); ``O(W * I * J)`` for Spearman. Memory: one chunk of
days times the pairs, never the history.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from monitor._typing import Returns2D
from monitor.engine.kernels import STALE_RATIO, finish, masked_sums, moments, outputs
from monitor.engine.layout import BoolArray, FloatArray, IntArray, Layout, Selector
from monitor.engine.rank import rank_block
from monitor.engine.spec import Measure
from monitor.engine.windows import (
    DEFAULT_CHUNK_BYTES,
    chunk_days,
    chunks,
    column_shift,
    delta_stack,
    flat_columns,
    window_stack,
)

DayArrays = tuple[FloatArray, FloatArray, BoolArray]

_ENTER_LEAVE = np.array([1.0, -1.0])


def overlay(
    base: Iterator[DayArrays],
    parts: list[tuple[Selector, Iterator[DayArrays]]],
    days: int,
) -> Iterator[DayArrays]:
    """Day by day, write each override's arrays over the base's (see ``Layout.split``)."""
    for _ in range(days):
        base_value, base_n, base_stale = next(base)
        value, n, stale = np.array(base_value), np.array(base_n), np.array(base_stale)
        for selector, arrays in parts:
            part_value, part_n, part_stale = next(arrays)
            value[selector], n[selector], stale[selector] = part_value, part_n, part_stale
        yield value, n, stale


class _Side:
    """One side of a fully observed block over a chunk: window means, deviations, updates.

    With the window mean ``m`` before and ``m'`` after day t's update (row ``x`` enters,
    row ``z`` leaves, the count stays W), the centred cross-product matrix changes by
    ``(x - m)(x - m')' - (z - m)(z - m')'``; both factors are per instrument, so a whole
    chunk of updates is one batched product of rank two.
    """

    def __init__(
        self, returns: Returns2D, columns: IntArray, shift: FloatArray, a: int, b: int, window: int
    ) -> None:
        rows = returns[a - window + 1 : b][:, columns] - shift[columns]
        anchor = rows[:window]
        entering = rows[window:]
        leaving = rows[: b - a - 1]
        totals = np.concatenate([anchor.sum(axis=0)[None], entering - leaving])
        np.cumsum(totals, axis=0, out=totals)
        self.mean = totals / window  # (days, K): window mean of each day
        before, after = self.mean[:-1], self.mean[1:]
        self.anchor_deviation = np.ascontiguousarray((anchor - self.mean[0]).T)[None]
        self.enter_before = entering - before
        self.enter_after = entering - after
        self.leave_before = leaving - before
        self.leave_after = leaving - after
        sumsq = np.concatenate(
            [
                np.einsum("kw,kw->k", self.anchor_deviation[0], self.anchor_deviation[0])[None],
                self.enter_before * self.enter_after - self.leave_before * self.leave_after,
            ]
        )
        np.cumsum(sumsq, axis=0, out=sumsq)
        self.sumsq = np.maximum(sumsq, 0.0)  # (days, K): sum of squared deviations

    def flat(self, window: int) -> BoolArray:
        """(days, K): zero variance up to rounding (relative to the raw moment about the shift)."""
        raw = self.sumsq + window * self.mean * self.mean
        return self.sumsq <= STALE_RATIO * raw

    def scale(self, flat: BoolArray) -> FloatArray:
        """(days, K): 1 / sqrt(sum of squared deviations), 0 where flat."""
        return np.where(flat, 0.0, 1.0 / np.sqrt(np.where(flat, 1.0, self.sumsq)))


def _complete_days(
    returns: Returns2D,
    sub: Layout,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
) -> Iterator[DayArrays]:
    """Rolling Pearson of a block whose instruments have every return in the chunk's windows.

    The chunk starts from the exact two-pass centred cross products of its first window;
    each later day adds the rank-two update of :class:`_Side`, and r is the centred cross
    product scaled by both sides' ``1 / sqrt(sum of squared deviations)``.
    """
    left = _Side(returns, sub.left_index, shift, a, b, window)
    right = left if sub.symmetric else _Side(returns, sub.right_index, shift, a, b, window)
    comoment = sub.cross(left.anchor_deviation, right.anchor_deviation)[0]
    if b - a > 1:
        updates = sub.cross(
            np.stack([left.enter_before, left.leave_before], axis=2),
            np.stack([right.enter_after, -right.leave_after], axis=2),
        )
        # rank-two updates for every day of the chunk: one batched product
    flat_left = left.flat(window) | flat_columns(returns, sub.left_index, a, b, window)
    flat_right = (
        flat_left
        if right is left
        else (right.flat(window) | flat_columns(returns, sub.right_index, a, b, window))
    )
    scale_left = left.scale(flat_left)
    scale_right = scale_left if right is left else right.scale(flat_right)
    count = np.float64(window)
    for c in range(b - a):
        if c:
            comoment += updates[c - 1]
        value = np.multiply(comoment, sub.left(scale_left[c]))
        value *= sub.right(scale_right[c])
        yield outputs(
            value, count, sub.left(flat_left[c]), sub.right(flat_right[c]), sub.shape, window
        )


def _pearson_days(
    returns: Returns2D,
    sub: Layout,
    good: bool,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
    min_count: int,
) -> Iterator[DayArrays]:
    """Rolling Pearson of one block for days ``a .. b-1``, one day at a time.

    The chunk's entering/leaving sums are computed together; the running totals and the
    correlation are then formed day by day, so the arrays touched stay cache-sized.
    """
    if good:
        yield from _complete_days(returns, sub, shift, a, b, window)
        return
    # the masked sums hold seven arrays of pairs per day: shorter runs between anchors
    size = max(1, min(b - a, DEFAULT_CHUNK_BYTES // (8 * 8 * int(np.prod(sub.shape)) + 1)))
    for lo, hi in chunks(a, b, size):
        yield from _masked_days(returns, sub, shift, lo, hi, window, min_count)


def _masked_days(
    returns: Returns2D,
    sub: Layout,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
    min_count: int,
) -> Iterator[DayArrays]:
    """Pairwise-complete rolling Pearson: anchored masked sums plus entering/leaving rows."""
    sides = [sub.left_index] if sub.symmetric else [sub.left_index, sub.right_index]
    anchors = [
        window_stack(returns, cols, a, a + 1, window) - shift[cols][:, None] for cols in sides
    ]
    deltas = [delta_stack(returns, cols, a, b, window) - shift[cols][:, None] for cols in sides]
    running = masked_sums(sub, anchors[0], anchors[-1], None)
    steps = masked_sums(sub, deltas[0], deltas[-1], _ENTER_LEAVE, squares=False)
    flat_left = flat_columns(returns, sub.left_index, a, b, window)
    flat_right = flat_columns(returns, sub.right_index, a, b, window)
    today = running.day(0).copy()
    for c in range(b - a):
        if c:
            today.add(steps.day(c - 1))
        yield finish(
            moments(today, centred=True),
            sub.shape,
            centred=True,
            min_count=min_count,
            flat=(sub.left(flat_left[c]), sub.right(flat_right[c])),
        )


def _block(
    returns: Returns2D,
    measure: Measure,
    sub: Layout,
    good: bool,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
) -> Iterator[DayArrays]:
    """Values, counts and stale flags of one block for days ``a .. b-1``, day by day."""
    if measure.kind == "rolling":
        yield from _pearson_days(returns, sub, good, shift, a, b, window, measure.min_count)
        return
    left = window_stack(returns, sub.left_index, a, b, window)
    right = None if sub.symmetric else window_stack(returns, sub.right_index, a, b, window)
    value, n, stale = rank_block(sub, left, right, good, measure.min_count)
    for c in range(b - a):
        yield value[c], n[c], stale[c]


def window_tile(
    returns: Returns2D,
    measure: Measure,
    layout: Layout,
    start: int,
    stop: int,
    chunk: int | None = None,
) -> Iterator[DayArrays]:
    """Rolling Pearson or Spearman values of a layout's pairs for rows ``start .. stop-1``.

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    measure : Measure with ``kind`` "rolling" or "rank"
    layout : Layout
    start, stop : int
        ``0 <= start < stop <= T``; the windows reach back before ``start`` as needed.
    chunk : int or None
        Days per chunk (default: sized to the tile).

    Yields
    ------
    value : float array ``layout.shape`` (read-only)
        In [-1, 1]; NaN below ``measure.min_count`` common returns or where a side is
        constant over the pair's common days.
    n : float array ``layout.shape``
        Common returns in the window.
    stale : bool array ``layout.shape``
    """
    window = measure.window
    if window is None:
        raise ValueError(f"window_tile needs a rolling or rank measure, got {measure.text}")
    columns = np.union1d(layout.left_index, layout.right_index)
    width = layout.left_index.size + (0 if layout.symmetric else layout.right_index.size)
    pair_count = int(np.prod(layout.shape))
    if measure.kind == "rank":
        size = chunk_days(pair_count, width, window, chunk, pair_arrays=4)
    else:
        size = chunk_days(pair_count, width, 2, chunk, pair_arrays=2)
    # the first W - 1 rows have windows cut at row 0, one length per day: one day at a time
    ramp_stop = min(stop, max(start, window - 1))
    for t in range(start, ramp_stop):
        yield from _chunk(returns, measure, layout, columns, t, t + 1, t + 1)
    for a, b in chunks(ramp_stop, stop, size):
        yield from _chunk(returns, measure, layout, columns, a, b, window)


def _chunk(
    returns: Returns2D,
    measure: Measure,
    layout: Layout,
    columns: IntArray,
    a: int,
    b: int,
    window: int,
) -> Iterator[DayArrays]:
    """Days ``a .. b-1`` with windows of ``window`` rows (all inside the matrix)."""
    rows = returns[a - window + 1 : b][:, columns]
    if window < measure.min_count:
        # too few rows for any value: only the counts are needed
        yield _counts_only(returns, layout, a, window)
        return
    complete = np.zeros(returns.shape[1], dtype=bool)
    complete[columns] = (~np.isnan(rows)).all(axis=0)
    shift = np.zeros(returns.shape[1])
    shift[columns] = column_shift(rows)
    fast, overrides = layout.split(complete[layout.left_index], complete[layout.right_index])
    base = _block(returns, measure, layout, fast, shift, a, b, window)
    if not overrides:
        yield from base
        return
    parts = [
        (selector, _block(returns, measure, sub, False, shift, a, b, window))
        for sub, selector in overrides
    ]
    yield from overlay(base, parts, b - a)


def _counts_only(returns: Returns2D, layout: Layout, t: int, window: int) -> DayArrays:
    """Day ``t`` when its window is shorter than the minimum: NaN values, common counts."""
    masks = [
        (~np.isnan(window_stack(returns, cols, t, t + 1, window))).astype(np.float64)
        for cols in (layout.left_index, layout.right_index)
    ]
    n = layout.cross(masks[0], masks[1])[0]
    return np.full(layout.shape, np.nan), n, np.zeros(layout.shape, dtype=bool)
