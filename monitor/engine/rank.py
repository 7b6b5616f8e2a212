"""Spearman correlation inside trailing windows: average ranks over each pair's common days.

Ranks are recomputed in every window (they are not additive, so there is no running sum).
Ties get the average of the ranks they span, as in the usual definition of Spearman's rho
(Pearson correlation of the ranks).

* Fast path: an instrument with a return on every row of the window is ranked once per
  window, vectorised over the chunk's days; the pairs of such instruments are one matrix
  product of standardised ranks. Cost per day: ``O(K W log W)`` to rank plus
  ``O(W I J)`` for the product.
* Pairs with a gap in the window: the ranks depend on the pair's common days. Each
  instrument is ranked once over its own days; a pair whose common days drop only a few
  of them (:data:`REMOVED_CAP`, the usual case of scattered missing days) corrects those
  ranks for the dropped rows, without sorting again; other pairs are ranked afresh on
  their common rows. Vectorised over all such pairs and days. Cost per day:
  ``O(P' W)`` for the ``P'`` pairs that touch an instrument with a gap (``O(P' W log W)``
  for those ranked afresh).

Ranks are small integers or halves, exact in floating point: a window of ties has a rank
variance of exactly zero and is flagged stale.
"""

from __future__ import annotations

import numpy as np

from monitor.engine.kernels import uniform_correlation
from monitor.engine.layout import BoolArray, FloatArray, Layout, PairLayout

PAIR_BATCH_BYTES = 32 * 2**20
"""Working memory of one batch of pairs ranked on their own common days."""


def average_ranks(values: FloatArray, axis: int = -1) -> FloatArray:
    """Ranks 1..k along ``axis`` with ties averaged; NaN entries get NaN and no rank.

    Parameters
    ----------
    values : float array
    axis : int
        Axis to rank along (the window axis of a (days, K, W) stack by default).

    Returns
    -------
    float array, same shape
        Each slice along ``axis`` holds the ranks of its valid entries among themselves.
    """
    moved = np.moveaxis(values, axis, -1)
    order = np.argsort(moved, axis=-1, kind="stable")
    ordered = np.take_along_axis(moved, order, axis=-1)
    size = moved.shape[-1]
    position = np.broadcast_to(np.arange(size), moved.shape)
    # a tie group starts where the sorted value changes; NaN != NaN keeps NaNs apart
    starts = np.ones(moved.shape, dtype=bool)
    starts[..., 1:] = ordered[..., 1:] != ordered[..., :-1]
    ends = np.ones(moved.shape, dtype=bool)
    ends[..., :-1] = starts[..., 1:]
    first = np.maximum.accumulate(np.where(starts, position, 0), axis=-1)
    last = np.flip(
        np.minimum.accumulate(np.flip(np.where(ends, position, size - 1), -1), axis=-1), -1
    )
    ranked = (first + last) / 2.0 + 1.0
    ranked[np.isnan(ordered)] = np.nan
    out = np.empty_like(ranked)
    np.put_along_axis(out, order, ranked, axis=-1)
    return np.moveaxis(out, -1, axis)


REMOVED_CAP = 4
"""Pairs whose common days drop at most this many of an instrument's own days in the window
get their ranks by correcting the instrument's own ranks; others are ranked afresh."""


def _spearman_of_ranks(
    rank_left: FloatArray, rank_right: FloatArray, common: BoolArray
) -> tuple[FloatArray, FloatArray, BoolArray]:
    """Pearson of ranks 1..n over each row's common entries: (B, W) -> (B,) value, n, flat."""
    count = common.sum(axis=1).astype(np.float64)
    # ranks 1..n over n common rows have mean (n + 1) / 2 exactly
    centre = ((count + 1.0) / 2.0)[:, None]
    dev_left = np.where(common, rank_left - centre, 0.0)
    dev_right = np.where(common, rank_right - centre, 0.0)
    ss_left = np.einsum("bw,bw->b", dev_left, dev_left)
    ss_right = np.einsum("bw,bw->b", dev_right, dev_right)
    flat = (ss_left <= 0.0) | (ss_right <= 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = np.einsum("bw,bw->b", dev_left, dev_right) / np.sqrt(ss_left * ss_right)
    value[flat] = np.nan
    np.clip(value, -1.0, 1.0, out=value)
    return value, count, flat


def _restricted_ranks(values: FloatArray, own: FloatArray, removed: BoolArray) -> FloatArray:
    """Average ranks after dropping the ``removed`` rows (at most REMOVED_CAP per row).

    The average rank of v is ``#{< v} + (#{== v} + 1) / 2``; dropping rows d lowers it by
    ``#{d: x_d < v} + #{d: x_d == v} / 2``, so no new sort is needed.
    """
    order = np.argsort(~removed, axis=1, kind="stable")[:, :REMOVED_CAP]
    taken = np.take_along_axis(removed, order, axis=1)
    dropped = np.take_along_axis(values, order, axis=1)[:, :, None]  # (B, cap, 1)
    current = values[:, None, :]
    with np.errstate(invalid="ignore"):
        below = (dropped < current) + 0.5 * (dropped == current)
    correction = np.einsum("bk,bkw->bw", taken.astype(np.float64), below)
    return own - correction


def rank_block(
    layout: Layout,
    left: FloatArray,
    right: FloatArray | None,
    both_full: bool,
    min_count: int,
) -> tuple[FloatArray, FloatArray, BoolArray]:
    """Spearman values of one block over a chunk of windows.

    Parameters
    ----------
    layout : Layout
    left, right : (days, K, W) float arrays of the block's left/right instruments
        ``right`` is None for a symmetric tile.
    both_full : bool
        True when no instrument of the block misses a return in any window of the chunk.
    min_count : int

    Returns
    -------
    value, n : (days, *layout.shape) float arrays
    stale : (days, *layout.shape) bool array
    """
    days, window = left.shape[0], left.shape[2]
    shape = (days,) + layout.shape
    if both_full:
        value, flat_left, flat_right = uniform_correlation(
            layout, average_ranks(left), None if right is None else average_ranks(right)
        )
        stale = np.broadcast_to(layout.left(flat_left) | layout.right(flat_right), shape)
        return value, np.broadcast_to(np.float64(window), shape), stale
    # gather every pair's two columns side by side: (days, P, W)
    right_stack = left if right is None else right
    if isinstance(layout, PairLayout):
        left_pos = np.arange(layout.shape[0])
        right_pos = left_pos
    else:
        rows, cols = layout.shape
        left_pos = np.repeat(np.arange(rows), cols)
        right_pos = np.tile(np.arange(cols), rows)
    valid_left = (~np.isnan(left)).astype(np.float64)
    valid_right = valid_left if right is None else (~np.isnan(right_stack)).astype(np.float64)
    count = layout.cross(valid_left, valid_right).reshape(days, -1)
    value = np.full(count.shape, np.nan)
    stale = np.zeros(count.shape, dtype=bool)
    # each instrument's ranks over its own days in each window, once
    own_left = average_ranks(left)
    own_right = own_left if right is None else average_ranks(right_stack)
    # rank only the (day, pair) cells that can have a value, a bounded batch at a time
    day_idx, pair_idx = np.nonzero(count >= min_count)
    batch = max(1, PAIR_BATCH_BYTES // (8 * (4 + 2 * REMOVED_CAP) * window))
    for lo in range(0, day_idx.size, batch):
        days_k, pairs_k = day_idx[lo : lo + batch], pair_idx[lo : lo + batch]
        x_left = left[days_k, left_pos[pairs_k]]
        x_right = right_stack[days_k, right_pos[pairs_k]]
        valid_l, valid_r = ~np.isnan(x_left), ~np.isnan(x_right)
        drop_left, drop_right = valid_l & ~valid_r, valid_r & ~valid_l
        few = (drop_left.sum(axis=1) <= REMOVED_CAP) & (drop_right.sum(axis=1) <= REMOVED_CAP)
        part_value = np.empty(days_k.size)
        part_flat = np.empty(days_k.size, dtype=bool)
        if few.any():
            ranks_l = _restricted_ranks(
                x_left[few], own_left[days_k[few], left_pos[pairs_k[few]]], drop_left[few]
            )
            ranks_r = _restricted_ranks(
                x_right[few], own_right[days_k[few], right_pos[pairs_k[few]]], drop_right[few]
            )
            part_value[few], _, part_flat[few] = _spearman_of_ranks(
                ranks_l, ranks_r, valid_l[few] & valid_r[few]
            )
        many = ~few
        if many.any():
            common = valid_l[many] & valid_r[many]
            part_value[many], _, part_flat[many] = _spearman_of_ranks(
                average_ranks(np.where(common, x_left[many], np.nan)),
                average_ranks(np.where(common, x_right[many], np.nan)),
                common,
            )
        value[days_k, pairs_k] = part_value
        stale[days_k, pairs_k] = part_flat
    return value.reshape(shape), count.reshape(shape), stale.reshape(shape)
