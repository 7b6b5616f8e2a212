"""Exponentially weighted correlation: weights, effective counts, the daily recursion.

Weights. The value at row ``t`` weighs each of the pair's common days ``s <= t`` by
``lam ** (t - s)``; a day on which either instrument lacks a return gets no weight but
still ages the older ones. This is exactly pandas'
``df.ewm(halflife=H, adjust=True, ignore_na=False).corr()`` (pandas 3.1,
``pandas/_libs/window/aggregations.pyx``, ``ewmcov``: the weight of the previous
observations is multiplied by ``1 - alpha = lam`` on every row once the pair has been
observed, observed or not, and a new observation enters with weight 1).

``mean=weighted`` removes the weighted mean of each side over the pair's common days.
The recursion is the one of that pandas routine, written with ``b = 1 / sum(w)`` (the new
day's share) and ``a = 1 - b``: with ``u = x - previous mean``,
``cov <- a cov + a b u_x u_y``, variances alike, ``mean <- mean + b u``.
Subtracting the previous mean first makes it insensitive to a large common offset.

``mean=zero`` is the zero-mean recursion of risk practice (J. C. Hull, Risk Management and
Financial Institutions, chapter on correlations and copulas)
``cov <- lam cov + (1 - lam) x y``, variances alike. The engine uses normalised weights,
``cov_t = sum lam^(t-s) x_s y_s / sum lam^(t-s)``, i.e. the same update with
``b = 1 / sum(w)``, which needs no seed; once ``sum(w)`` has converged to ``1 / (1 - lam)``,
``b = 1 - lam`` and the update is Hull's. Indexing: Hull's estimate for day n uses the
returns up to day n-1; the engine's value at row t includes row t's return, so it is
Hull's estimate for day t + 1 (the estimate made at t's close). :func:`hull_update` is
Hull's step as printed.

Warm-up. A stream that starts at row ``start > 0`` (and :func:`one_day` of the stream
module) does not run the recursion from row 0: it starts from the closed form at
``start - 1`` over the last :func:`truncation_rows` rows before it (counted back from the
earliest last return of the block's instruments), where the omitted weights sum to less
than :data:`TAIL_WEIGHT` of one day's weight. That is far below rounding; the tests check
that such a stream equals a full pass to 1e-12.

Minimum and stale. ``min=M`` applies to the Kish effective count
``n_eff = (sum w)^2 / sum w^2`` over the pair's common days (the ``n`` reported): below it
the value is NaN. A side is stale when its weighted variance is zero up to rounding, i.e.
all its common returns so far are equal; a constant stretch after moves lowers the
variance geometrically but keeps a value (as pandas does), so a stale close inside a long
history is for the rolling measures and the data checks to catch. A pair with no common
return on a day keeps its value and ``n_eff`` (the weights age alike).

Blocks. The instruments whose validity over all rows is the most common pattern share one
history of weights: their block runs the recursion with per-instrument means and
variances and one rank-one update of the (I, J) covariance per day
(:func:`_uniform_days`). Pairs touching any other instrument run the general per-pair
recursion (:func:`_days`) and overwrite the block's rows and columns.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor._typing import Returns2D
from monitor.engine.gappy_ewma import ewma_gappy_days
from monitor.engine.kernels import (
    STALE_RATIO,
    FloatArray,
    Moments,
    constant,
    finish,
    masked_sums,
    moments,
    outputs,
    uniform_sums,
)
from monitor.engine.layout import BoolArray, Layout, TileLayout
from monitor.engine.rolling import overlay
from monitor.engine.spec import Measure
from monitor.engine.windows import column_shift
from monitor.errors import EngineInputError

TAIL_WEIGHT = 1e-16
"""Weight of the history a warm-up omits, relative to one new day's weight."""


def kish_effective_count(weights: npt.ArrayLike) -> float:
    """Kish (1965, Survey Sampling) effective sample size ``(sum w)^2 / sum w^2``.

    Parameters
    ----------
    weights : (n,) array of non-negative weights; NaN entries count as no observation.
    """
    w = np.asarray(weights, dtype=np.float64)
    w = w[~np.isnan(w)]
    total2 = float(np.sum(w * w))
    return float(np.sum(w)) ** 2 / total2 if total2 > 0 else 0.0


def hull_update(
    cov: float, var_x: float, var_y: float, x: float, y: float, lam: float
) -> tuple[float, float, float]:
    """One step of the zero-mean EWMA recursion, as in Hull (see module docstring).

    ``cov_n = lam cov_{n-1} + (1 - lam) x_{n-1} y_{n-1}``, variances alike, where ``x`` and
    ``y`` are the latest returns. Returns ``(cov, var_x, var_y)``.
    """
    b = 1.0 - lam
    return lam * cov + b * x * y, lam * var_x + b * x * x, lam * var_y + b * y * y


def truncation_rows(lam: float) -> int:
    """Rows a warm-up keeps: the omitted tail ``lam^K / (1 - lam)`` is below TAIL_WEIGHT."""
    return max(1, math.ceil(math.log(TAIL_WEIGHT * (1.0 - lam)) / math.log(lam)))


def _dominant_columns(valid: BoolArray) -> BoolArray:
    """Columns whose validity over all rows equals the most common column pattern.

    Pairs among them share one history of weights, so their means and variances are per
    instrument and a day costs one rank-one update.
    """
    if valid.shape[1] == 0:
        return np.zeros(0, dtype=bool)
    packed = np.packbits(valid, axis=0)
    keys = [packed[:, k].tobytes() for k in range(valid.shape[1])]
    counts: dict[bytes, int] = {}
    for key in keys:
        counts[key] = counts.get(key, 0) + 1
    top = max(counts, key=lambda key: counts[key])
    return np.array([key == top for key in keys])


@dataclass
class _State:
    """Recursion state of one block; ``m`` arrays are small in the uniform block."""

    layout: Layout
    moments: Moments
    uniform: bool
    common: BoolArray | None  # uniform block: the rows on which its instruments have returns


def _empty_moments(layout: Layout, uniform: bool) -> Moments:
    shape = layout.shape
    if uniform:
        left = layout.left(np.zeros(len(layout.left_index)))
        right = layout.right(np.zeros(len(layout.right_index)))
        return Moments(
            np.zeros(()),
            np.zeros(()),
            left.copy(),
            right.copy(),
            left.copy(),
            right.copy(),
            np.zeros(shape),
        )
    return Moments(*(np.zeros(shape) for _ in range(7)))


def _closed_form(
    shifted: Returns2D,
    layout: Layout,
    lam: float,
    t: int,
    lo: int,
    centred: bool,
    common: BoolArray | None,
) -> Moments:
    """Moments at row ``t`` from rows ``lo .. t`` with weights ``lam**(t - s)``."""
    rows = np.arange(lo, t + 1)
    if common is not None:
        rows = rows[common[lo : t + 1]]
        if rows.size == 0:
            return _empty_moments(layout, uniform=True)
    weights = lam ** (t - rows).astype(np.float64)
    block = shifted[rows]
    left = np.ascontiguousarray(block[:, layout.left_index].T)[None]
    right = None if layout.symmetric else np.ascontiguousarray(block[:, layout.right_index].T)[None]
    if common is not None:
        m = moments(uniform_sums(layout, left, right, weights), centred=centred)
        return Moments(
            m.weight[0].reshape(()),
            m.weight2[0].reshape(()),
            m.mean_left[0].copy(),
            m.mean_right[0].copy(),
            m.var_left[0].copy(),
            m.var_right[0].copy(),
            m.cov[0].copy(),
        )
    sums = masked_sums(layout, left, left if right is None else right, weights)
    m = moments(sums, centred=centred)
    return Moments(*(np.ascontiguousarray(f[0]) for f in vars(m).values()))


def _step(
    state: _State,
    x_left: FloatArray,
    x_right: FloatArray,
    mm: FloatArray,
    lam: float,
    centred: bool,
) -> None:
    """Age the weights by one row and add the row's returns (``mm`` = 1 where both present)."""
    m = state.moments
    m.weight = lam * m.weight + mm
    m.weight2 = (lam * lam) * m.weight2 + mm
    b = np.divide(mm, m.weight, out=np.zeros(np.shape(m.weight)), where=m.weight > 0)
    a = 1.0 - b
    if centred:
        u_left = x_left - m.mean_left
        u_right = x_right - m.mean_right
        ab = a * b
        m.cov *= a
        m.cov += (ab * u_left) * u_right
        m.var_left = a * m.var_left + ab * u_left * u_left
        m.var_right = a * m.var_right + ab * u_right * u_right
        m.mean_left = m.mean_left + b * u_left
        m.mean_right = m.mean_right + b * u_right
    else:
        m.cov *= a
        m.cov += (b * x_left) * x_right
        m.var_left = a * m.var_left + b * x_left * x_left
        m.var_right = a * m.var_right + b * x_right * x_right


def _warm_start(valid: BoolArray, columns: npt.NDArray[np.intp], start: int, lam: float) -> int:
    """First row of the warm-up window for a stream starting at ``start``."""
    seen = valid[:start][:, columns]
    any_seen = seen.any(axis=0)
    if not any_seen.any():
        return start
    last = (start - 1) - np.argmax(seen[::-1], axis=0)
    earliest_last = int(last[any_seen].min())
    return max(0, earliest_last - truncation_rows(lam) + 1)


def ewma_tile(
    returns: Returns2D, measure: Measure, layout: Layout, start: int, stop: int
) -> Iterator[tuple[FloatArray, FloatArray, BoolArray]]:
    """EWMA values of a layout's pairs for rows ``start .. stop-1``, one row at a time.

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    measure : Measure with ``kind == "ewma"``
    layout : Layout
    start, stop : int
        ``0 <= start < stop <= T``.

    Yields
    ------
    value : float array ``layout.shape``
        Correlation in [-1, 1]; NaN below ``measure.min_count`` effective observations or
        where a side has zero weighted variance.
    n : float array ``layout.shape``
        Kish effective count over the pair's common days.
    stale : bool array ``layout.shape``
    """
    if measure.lam is None:
        raise EngineInputError(f"ewma_tile needs an ewma measure, got {measure.text}")
    lam = measure.lam
    centred = measure.centred
    valid = ~np.isnan(returns[:stop])
    columns = np.union1d(layout.left_index, layout.right_index)
    lo = _warm_start(valid, columns, start, lam) if start > 0 else 0
    shift = np.zeros(returns.shape[1])
    if centred:
        shift[columns] = column_shift(returns[lo:stop][:, columns])
    shifted = returns[:stop] - shift

    dominant = np.zeros(returns.shape[1], dtype=bool)
    dominant[columns] = _dominant_columns(valid[:, columns])
    fast, overrides = layout.split(dominant[layout.left_index], dominant[layout.right_index])
    if centred and isinstance(layout, TileLayout) and (overrides or not fast):
        # a tile with gaps: running matrix sums for every pair (monitor.engine.gappy_ewma)
        yield from ewma_gappy_days(returns, layout, lam, measure.min_count, start, stop, lo)
        return
    common = valid[:, np.flatnonzero(dominant)[0]] if fast else None
    blocks = [(layout, fast)] + [(sub, False) for sub, _ in overrides]
    states = []
    for sub, uniform in blocks:
        block_common = common if uniform else None
        if start > 0:
            moments = _closed_form(shifted, sub, lam, start - 1, lo, centred, block_common)
        else:
            moments = _empty_moments(sub, uniform=uniform)
        states.append(_State(sub, moments, uniform, block_common))
    days = (
        _uniform_days(state, shifted, lam, centred, measure.min_count, start, stop)
        if state.uniform
        else _days(state, shifted, valid, lam, centred, measure.min_count, start, stop)
        for state in states
    )
    base, *rest = days
    if not overrides:
        yield from base
        return
    parts = [(selector, arrays) for (_, selector), arrays in zip(overrides, rest, strict=True)]
    yield from overlay(base, parts, stop - start)


def _days(
    state: _State,
    shifted: Returns2D,
    valid: BoolArray,
    lam: float,
    centred: bool,
    min_count: int,
    start: int,
    stop: int,
) -> Iterator[tuple[FloatArray, FloatArray, BoolArray]]:
    """Run one block's recursion over rows ``start .. stop-1``, yielding each day."""
    sub = state.layout
    left_index, right_index = sub.left_index, sub.right_index
    last: tuple[FloatArray, FloatArray, BoolArray] | None = None
    for t in range(start, stop):
        row = shifted[t]
        row_valid = valid[t]
        if state.common is not None:
            present = bool(state.common[t])
            mm: FloatArray = np.asarray(1.0 if present else 0.0)
        else:
            present = True
            both = sub.left(row_valid[left_index]) & sub.right(row_valid[right_index])
            mm = both.astype(np.float64)
        if present or last is None:
            x_left = sub.left(np.where(row_valid[left_index], row[left_index], 0.0))
            x_right = sub.right(np.where(row_valid[right_index], row[right_index], 0.0))
            _step(state, x_left, x_right, mm, lam, centred)
            last = finish(state.moments, sub.shape, centred=centred, min_count=min_count)
            last[0].flags.writeable = False
        else:
            # no common return today: the weights age alike, values and n_eff stay
            state.moments.weight = lam * state.moments.weight
            state.moments.weight2 = lam * lam * state.moments.weight2
        yield last


UNIFORM_CHUNK_DAYS = 32
"""Most days whose rank-one updates the uniform block computes in one batched product."""
UNIFORM_CHUNK_BYTES = 16 * 2**20
"""Memory those batched updates may take."""
_SMALLEST_SCALE = 1e-150


def _uniform_days(
    state: _State,
    shifted: Returns2D,
    lam: float,
    centred: bool,
    min_count: int,
    start: int,
    stop: int,
) -> Iterator[tuple[FloatArray, FloatArray, BoolArray]]:
    """The recursion of a block whose pairs share one history of weights, chunk by chunk.

    Every pair then has the same ``a`` and ``b`` each day, and means and variances are per
    instrument. The covariance is kept as ``cov_t = A_t * K_t`` with ``A_t`` the product of
    the ``a`` since the chunk began, so that ``K_t = K_{t-1} + (a b / A_t) u_x u_y'``: the
    chunk's rank-one terms are one batched product and each day costs one addition, two
    scalings and the clip over the pairs. ``A`` is re-based when it gets small, and is
    undefined only on a pair's first observation (``a = 0``), where the covariance restarts
    at zero.
    """
    sub = state.layout
    m = state.moments
    if state.common is None:
        raise EngineInputError("a uniform block needs its common rows")
    mean_left, var_left = m.mean_left.reshape(-1).copy(), m.var_left.reshape(-1).copy()
    mean_right, var_right = m.mean_right.reshape(-1).copy(), m.var_right.reshape(-1).copy()
    symmetric = sub.symmetric
    weight, weight2 = float(m.weight), float(m.weight2)
    cov = np.array(np.broadcast_to(m.cov, sub.shape))
    last: tuple[FloatArray, FloatArray, BoolArray] | None = None
    pairs = int(np.prod(sub.shape))
    size = int(max(1, min(UNIFORM_CHUNK_DAYS, UNIFORM_CHUNK_BYTES // (8 * max(pairs, 1)))))
    for a0 in range(start, stop, size):
        b0 = min(stop, a0 + size)
        rows = shifted[a0:b0]
        present = state.common[a0:b0]
        days = b0 - a0
        # per-day scalars and per-instrument vectors, in order
        factor = np.ones(days)  # a_t
        gain = np.zeros(days)  # a_t b_t (b_t for mean=zero)
        neff = np.zeros(days)
        u_left = np.zeros((days, sub.left_index.size))
        u_right = u_left if symmetric else np.zeros((days, sub.right_index.size))
        moments_left = []
        moments_right = []
        for c in range(days):
            weight = lam * weight + float(present[c])
            weight2 = lam * lam * weight2 + float(present[c])
            neff[c] = weight * weight / weight2 if weight2 > 0 else 0.0
            if present[c]:
                b = 1.0 / weight
                a = 1.0 - b
                x_left = rows[c, sub.left_index]
                x_right = x_left if symmetric else rows[c, sub.right_index]
                if centred:
                    dev_left = x_left - mean_left
                    var_left = a * var_left + a * b * dev_left * dev_left
                    mean_left = mean_left + b * dev_left
                    u_left[c] = dev_left
                    if not symmetric:
                        dev_right = x_right - mean_right
                        var_right = a * var_right + a * b * dev_right * dev_right
                        mean_right = mean_right + b * dev_right
                        u_right[c] = dev_right
                    gain[c] = a * b
                else:
                    var_left = a * var_left + b * x_left * x_left
                    u_left[c] = x_left
                    if not symmetric:
                        var_right = a * var_right + b * x_right * x_right
                        u_right[c] = x_right
                    gain[c] = b
                factor[c] = a
            moments_left.append((mean_left, var_left))
            moments_right.append((mean_left, var_left) if symmetric else (mean_right, var_right))
        # scale A_t relative to the chunk start; re-based on a restart or when tiny
        scale = np.empty(days)
        restart = np.zeros(days, dtype=bool)
        running = 1.0
        for c in range(days):
            if factor[c] == 0.0 or running * factor[c] < _SMALLEST_SCALE:
                restart[c] = True
                running = 1.0
            else:
                running *= factor[c]
            scale[c] = running
        coefficient = gain / scale
        # rank-one terms of every day: an outer product, no matrix multiply needed
        updates = sub.left(u_left * coefficient[:, None]) * sub.right(u_right)
        # per-day statistics of every instrument, for the whole chunk at once
        mean_l = np.array([item[0] for item in moments_left])
        var_l = np.array([item[1] for item in moments_left])
        mean_r = np.array([item[0] for item in moments_right])
        var_r = np.array([item[1] for item in moments_right])
        flat_l, inv_l = _flat_and_inverse(mean_l, var_l, centred)
        flat_r, inv_r = _flat_and_inverse(mean_r, var_r, centred)
        inv_l *= scale[:, None]
        any_flat: BoolArray = np.asarray(flat_l.any(axis=1) | flat_r.any(axis=1))
        no_stale = constant(False, sub.shape, np.bool_)
        kept = cov  # K at the chunk start, where A = 1
        before = 1.0
        for c in range(days):
            if restart[c]:
                kept *= factor[c] * before  # a new segment: K = cov, A = 1 (0 on a restart)
            if present[c]:
                kept += updates[c]
            before = scale[c]
            if present[c] or last is None:
                value = np.multiply(kept, sub.left(inv_l[c]))
                value *= sub.right(inv_r[c])
                count = constant(neff[c], sub.shape)
                if any_flat[c] or neff[c] < min_count * (1.0 - 1e-12):
                    last = outputs(
                        value,
                        count,
                        sub.left(flat_l[c]),
                        sub.right(flat_r[c]),
                        sub.shape,
                        min_count,
                    )
                else:
                    np.clip(value, -1.0, 1.0, out=value)
                    last = (value, count, no_stale)
                last[0].flags.writeable = False
            yield last
        cov = kept * scale[days - 1]
    m.weight, m.weight2 = np.asarray(weight), np.asarray(weight2)
    m.mean_left, m.var_left = sub.left(mean_left), sub.left(var_left)
    m.mean_right = sub.right(mean_left if symmetric else mean_right)
    m.var_right = sub.right(var_left if symmetric else var_right)
    m.cov = cov


def _flat_and_inverse(
    mean: FloatArray, var: FloatArray, centred: bool
) -> tuple[BoolArray, FloatArray]:
    """Zero-variance flags and ``1 / sqrt(var)`` (0 where flat) of (days, K) statistics."""
    if centred:
        flat = var <= STALE_RATIO * (var + mean * mean)
    else:
        flat = var <= 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        inverse = np.where(flat, 0.0, 1.0 / np.sqrt(np.where(flat, 1.0, var)))
    return flat, inverse
