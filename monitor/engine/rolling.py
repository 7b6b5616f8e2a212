"""Trailing-window measures (``rolling:W``, ``rank:W``) of one layout, chunk by chunk.

Pearson (``rolling``) keeps running window sums and re-anchors them:

* Days whose windows hold a return for every instrument of the tile (the fast path) keep
  the centred cross products of the window, ``M = sum (x - m)(y - m)'``, exact from a
  two-pass anchor. Each next day adds a rank-two update (the row that enters, the row
  that leaves; :class:`_Side`), a chunk of updates being one batched product, and carries
  ``M`` into the next chunk. A fresh anchor is taken when the squared deviations the
  running sums have absorbed since the last anchor exceed :data:`REANCHOR_RATIO` times an
  instrument's current sum of squared deviations, i.e. when rounding could start to show
  (after a burst of large moves leaves the window, or every ~5 W days otherwise).
* Days with a gap in some instrument's window: a tile is computed whole from running
  matrix sums over every pair's common days (:mod:`monitor.engine.gappy`: counts, partial
  sums and squares, cross products, re-anchored every chunk), on data centred by each
  instrument's chunk mean, so that a large common offset costs no accuracy. A pair list
  keeps the fast path for its complete pairs and the masked sums of
  :mod:`monitor.engine.kernels` for the others.

However long the history, values agree with a two-pass computation to about 1e-14. Zero
variance is detected exactly (largest == smallest over the window), not from the sums.

Spearman (``rank``) cannot be updated (ranks change with the window), so each window is
ranked and correlated afresh (:mod:`monitor.engine.rank`).

Cost per day, tile I x J: ``O(I * J)`` elementwise work for Pearson (plus a
``O(W * I * J)`` anchor now and then); ``O(W * I * J)`` for Spearman. Memory: one chunk
of days times the pairs, never the history.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np

from monitor._typing import Returns2D
from monitor.engine.gappy import GappyState, gappy_days
from monitor.engine.kernels import (
    STALE_RATIO,
    constant,
    finish,
    masked_sums,
    moments,
    outputs,
)
from monitor.engine.layout import BoolArray, FloatArray, IntArray, Layout, Selector, TileLayout
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
from monitor.errors import EngineInputError

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


REANCHOR_RATIO = 10.0
"""Re-anchor when the squared deviations an instrument's running sums have absorbed since the
last anchor exceed this many times its current sum of squared deviations. The rounding left
in each running sum then stays below about ``4 * 10 * 2.2e-16 = 1e-14`` of its value, a few
times that in a correlation. With steady volatility this re-anchors about every 5 W days."""


@dataclass
class _Carry:
    """Running centred cross products handed from one chunk to the next (fast path only)."""

    day: int = -1
    comoment: FloatArray | None = None
    absorbed_left: FloatArray | None = None
    absorbed_right: FloatArray | None = None
    # the running sums of the gappy path (monitor.engine.gappy), carried the same way
    gappy: list[GappyState | None] = field(default_factory=lambda: [None])


class _Side:
    """One side of a fully observed block: window means, deviations, updates, day by day.

    Covers days ``first .. b-1``; day ``first`` is the anchor (its window's statistics are
    exact two-pass values), the others are updates. With the window mean ``m`` before and
    ``m'`` after day t's update (row ``x`` enters, row ``z`` leaves, the count stays W),
    the centred cross-product matrix changes by ``(x - m)(x - m')' - (z - m)(z - m')'``;
    both factors are per instrument, so a whole chunk of updates is one batched product of
    rank two.
    """

    def __init__(
        self,
        returns: Returns2D,
        columns: IntArray,
        shift: FloatArray,
        first: int,
        b: int,
        window: int,
    ) -> None:
        self.rows = returns[first - window + 1 : b][:, columns] - shift[columns]
        anchor = self.rows[:window]
        entering = self.rows[window:]
        leaving = self.rows[: b - first - 1]
        totals = np.concatenate([anchor.sum(axis=0)[None], entering - leaving])
        np.cumsum(totals, axis=0, out=totals)
        self.mean = totals / window  # (days, K): window mean of each day
        before, after = self.mean[:-1], self.mean[1:]
        self.enter_before = entering - before
        self.enter_after = entering - after
        self.leave_before = leaving - before
        self.leave_after = leaving - after
        deviation = anchor - self.mean[0]
        sumsq = np.concatenate(
            [
                np.einsum("wk,wk->k", deviation, deviation)[None],
                self.enter_before * self.enter_after - self.leave_before * self.leave_after,
            ]
        )
        np.cumsum(sumsq, axis=0, out=sumsq)
        self.sumsq = np.maximum(sumsq, 0.0)  # (days, K): sum of squared deviations
        # squared size of what each update adds, for the re-anchoring rule
        self.absorbed = np.abs(self.enter_before * self.enter_after) + np.abs(
            self.leave_before * self.leave_after
        )
        self.window = window

    def reanchor(self, anchors: BoolArray) -> None:
        """Restart the running sums of squared deviations from exact values on anchor days."""
        days = np.flatnonzero(anchors)
        if days.size == 0:
            return
        steps = np.diff(self.sumsq, axis=0)
        for k, c in enumerate(days):
            block = self.rows[c : c + self.window] - self.mean[c]
            stop = days[k + 1] if k + 1 < days.size else self.sumsq.shape[0]
            segment = np.concatenate(
                [np.einsum("wk,wk->k", block, block)[None], steps[c : stop - 1]]
            )
            self.sumsq[c:stop] = np.maximum(np.cumsum(segment, axis=0), 0.0)

    def deviations(self, c: int) -> FloatArray:
        """(1, K, W): day c's window rows minus that day's mean (for an exact anchor)."""
        block = self.rows[c : c + self.window] - self.mean[c]
        return np.ascontiguousarray(block.T)[None]

    def flat(self) -> BoolArray:
        """(days, K): zero variance up to rounding (relative to the raw moment about the shift)."""
        raw = self.sumsq + self.window * self.mean * self.mean
        return self.sumsq <= STALE_RATIO * raw

    def scale(self, flat: BoolArray) -> FloatArray:
        """(days, K): 1 / sqrt(sum of squared deviations), 0 where flat."""
        return np.where(flat, 0.0, 1.0 / np.sqrt(np.where(flat, 1.0, self.sumsq)))


def _anchor_days(
    sides: list[_Side], flats: list[BoolArray], start: list[FloatArray] | None
) -> tuple[BoolArray, list[FloatArray]]:
    """Days (after the first) that need a fresh anchor, and what is absorbed at the end.

    Walks from one anchor to the next with cumulative sums, so the cost is per anchor,
    not per day.
    """
    days = sides[0].mean.shape[0]
    absorbed = [np.zeros_like(s.sumsq[0]) for s in sides] if start is None else list(start)
    anchor = np.zeros(days, dtype=bool)
    c = 1
    while c < days:
        exceeded = np.zeros(days - c, dtype=bool)
        totals = []
        for base, side, flat in zip(absorbed, sides, flats, strict=True):
            total = base + np.cumsum(side.absorbed[c - 1 : days - 1], axis=0)
            # a constant instrument has no variance to compare with; its values are NaN
            over = (total > REANCHOR_RATIO * side.sumsq[c:]) & ~flat[c:]
            exceeded |= over.any(axis=1)
            totals.append(total)
        hits = np.flatnonzero(exceeded)
        if hits.size == 0:
            absorbed = [total[-1] for total in totals]
            break
        c += int(hits[0])
        anchor[c] = True
        absorbed = [np.zeros_like(base) for base in absorbed]
        c += 1
    return anchor, absorbed


def _complete_days(
    returns: Returns2D,
    sub: Layout,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
    carry: _Carry,
) -> Iterator[DayArrays]:
    """Rolling Pearson of a block whose instruments have every return in the chunk's windows.

    The centred cross products come from the previous chunk (``carry``) or from an exact
    two-pass anchor; each day adds the rank-two update of :class:`_Side`, and a fresh anchor
    is taken whenever the rounding the running sums may hold could reach 1e-13 of a
    correlation (:data:`REANCHOR_RATIO`), e.g. after a burst of large moves leaves the
    window. r is the centred cross product scaled by both sides'
    ``1 / sqrt(sum of squared deviations)``.
    """
    continuing = carry.day == a - 1 and carry.comoment is not None
    first = a - 1 if continuing else a
    left = _Side(returns, sub.left_index, shift, first, b, window)
    right = left if sub.symmetric else _Side(returns, sub.right_index, shift, first, b, window)
    days = b - first
    if days > 1:
        # rank-two updates for every day of the chunk: one batched product
        updates = sub.cross(
            np.stack([left.enter_before, left.leave_before], axis=2),
            np.stack([right.enter_after, -right.leave_after], axis=2),
        )
    flat_left = left.flat() | flat_columns(returns, sub.left_index, first, b, window)
    flat_right = (
        flat_left
        if right is left
        else (right.flat() | flat_columns(returns, sub.right_index, first, b, window))
    )
    sides = [left] if right is left else [left, right]
    flats = [flat_left] if right is left else [flat_left, flat_right]
    previous = None
    if continuing and carry.absorbed_left is not None:
        previous = [carry.absorbed_left] + ([] if right is left else [carry.absorbed_right])
    anchor, absorbed = _anchor_days(sides, flats, previous)  # type: ignore[arg-type]
    if anchor.any():
        for side in sides:
            side.reanchor(anchor)
        flat_left = left.flat() | flat_columns(returns, sub.left_index, first, b, window)
        flat_right = (
            flat_left
            if right is left
            else (right.flat() | flat_columns(returns, sub.right_index, first, b, window))
        )
    scale_left = left.scale(flat_left)
    scale_right = scale_left if right is left else right.scale(flat_right)
    # the count is W for every pair and day; most days have no flat instrument
    count = constant(float(window), sub.shape)
    no_stale = constant(False, sub.shape, np.bool_)
    any_flat: BoolArray = np.asarray(flat_left.any(axis=1) | flat_right.any(axis=1))
    if continuing and carry.comoment is not None:
        comoment = carry.comoment
    else:
        comoment = sub.cross(left.deviations(0), right.deviations(0))[0]
    for c in range(days):
        if c:
            if anchor[c]:
                comoment = sub.cross(left.deviations(c), right.deviations(c))[0]
            else:
                comoment += updates[c - 1]
        if continuing and c == 0:
            continue  # the previous chunk's last day
        value = np.multiply(comoment, sub.left(scale_left[c]))
        value *= sub.right(scale_right[c])
        if any_flat[c]:
            yield outputs(
                value, count, sub.left(flat_left[c]), sub.right(flat_right[c]), sub.shape, window
            )
        else:
            np.clip(value, -1.0, 1.0, out=value)
            yield value, count, no_stale
    carry.day, carry.comoment = b - 1, comoment
    carry.absorbed_left = absorbed[0]
    carry.absorbed_right = absorbed[-1]


def _pearson_days(
    returns: Returns2D,
    sub: Layout,
    good: bool,
    shift: FloatArray,
    a: int,
    b: int,
    window: int,
    min_count: int,
    carry: _Carry,
) -> Iterator[DayArrays]:
    """Rolling Pearson of one block for days ``a .. b-1``, one day at a time.

    The chunk's entering/leaving sums are computed together; the running totals and the
    correlation are then formed day by day, so the arrays touched stay cache-sized.
    """
    if good:
        yield from _complete_days(returns, sub, shift, a, b, window, carry)
        return
    if isinstance(sub, TileLayout):
        # running matrix sums for the whole tile, carried from chunk to chunk
        yield from gappy_days(returns, sub, shift, a, b, window, min_count, carry.gappy)
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
    carry: _Carry | None = None,
) -> Iterator[DayArrays]:
    """Values, counts and stale flags of one block for days ``a .. b-1``, day by day.

    ``carry`` hands the fast path's running sums from chunk to chunk; None: start afresh.
    """
    if measure.kind == "rolling":
        yield from _pearson_days(
            returns, sub, good, shift, a, b, window, measure.min_count, carry or _Carry()
        )
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
        raise EngineInputError(f"window_tile needs a rolling or rank measure, got {measure.text}")
    columns = np.union1d(layout.left_index, layout.right_index)
    width = layout.left_index.size + (0 if layout.symmetric else layout.right_index.size)
    pair_count = int(np.prod(layout.shape))
    if measure.kind == "rank":
        size = chunk_days(pair_count, width, window, chunk, pair_arrays=4)
    else:
        size = chunk_days(pair_count, width, 2, chunk, pair_arrays=2)
    carry = _Carry()
    ramp_stop = min(stop, max(start, window - 1))
    if measure.kind == "rank":
        # the first W - 1 rows have windows cut at row 0, one length per day: a day at a time
        for t in range(start, ramp_stop):
            yield from _chunk(returns, measure, layout, columns, t, t + 1, t + 1, carry)
    elif start < ramp_stop:
        # cut windows as full windows with missing rows before row 0 (pairwise path)
        yield from _chunk(returns, measure, layout, columns, start, ramp_stop, window, carry)
    for lo, hi in _runs(returns, columns, ramp_stop, stop, window):
        for a, b in chunks(lo, hi, size):
            yield from _chunk(returns, measure, layout, columns, a, b, window, carry)


def _runs(
    returns: Returns2D, columns: IntArray, start: int, stop: int, window: int
) -> list[tuple[int, int]]:
    """Cut ``[start, stop)`` where the windows switch between "every instrument has every
    return" and not, so that a chunk never mixes the two (a gap then sends only the days
    whose windows hold it down the slower path, not a whole chunk)."""
    if start >= stop:
        return []
    first = max(0, start - window + 1)
    gap_rows = np.isnan(returns[first:stop][:, columns]).any(axis=1).astype(np.int64)
    counts = np.concatenate([[0], np.cumsum(gap_rows)])
    days = np.arange(start, stop)
    lo = np.maximum(days - window + 1, 0) - first
    complete = (counts[days - first + 1] - counts[lo]) == 0
    edges = np.flatnonzero(complete[1:] != complete[:-1]) + 1 + start
    bounds = [start, *edges.tolist(), stop]
    return list(zip(bounds[:-1], bounds[1:], strict=True))


def _chunk(
    returns: Returns2D,
    measure: Measure,
    layout: Layout,
    columns: IntArray,
    a: int,
    b: int,
    window: int,
    carry: _Carry,
) -> Iterator[DayArrays]:
    """Days ``a .. b-1`` with windows of ``window`` rows (cut at row 0 before row W - 1)."""
    first = a - window + 1
    rows = returns[max(0, first) : b][:, columns]
    if measure.kind == "rank" and window < measure.min_count:
        # too few rows for any value: only the counts are needed
        yield _counts_only(returns, layout, a, window)
        return
    complete = np.zeros(returns.shape[1], dtype=bool)
    complete[columns] = (~np.isnan(rows)).all(axis=0) & (first >= 0)
    shift = np.zeros(returns.shape[1])
    shift[columns] = column_shift(rows)
    fast, overrides = layout.split(complete[layout.left_index], complete[layout.right_index])
    if measure.kind == "rolling" and overrides and isinstance(layout, TileLayout):
        # a tile with gaps is computed whole by the running matrix sums (monitor.engine.gappy)
        fast, overrides = False, []
    if not (fast and not overrides):
        carry.day = -1  # the running sums cannot continue across this chunk
    base = _block(returns, measure, layout, fast, shift, a, b, window, carry)
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
