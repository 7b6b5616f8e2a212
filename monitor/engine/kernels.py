"""Correlation inside windows: weighted pair sums, the moments and the correlation they give.

Stacks of window rows are ``(days, K, W)`` arrays (window axis last), already shifted by
:func:`~monitor.engine.windows.column_shift`. Row weights ``w`` are (W,) or (days, W);
equal weights are 1, an EWMA uses ``lam ** age``, and a day-to-day update of a rolling
window uses ``(+1, -1)`` on the row that enters and the row that leaves.

* :func:`masked_sums` — pairwise-complete sums with gaps. With ``Y`` the shifted returns
  (NaN -> 0) and ``M`` the validity mask: ``S0 = (wM)'M``, ``Sx = (wY)'M``,
  ``Sxx = (wY*Y)'M``, ``Sxy = (wY)'Y`` (and ``(w^2 M)'M`` for the Kish count), each pair
  over its common days only.
* :func:`uniform_sums` — every instrument of the stack has a return on every row:
  ``S0`` is one number per day, ``Sx`` and ``Sxx`` are per instrument, only ``Sxy`` is
  per pair (the EWMA warm-up of a block sharing one history).
* :func:`moments` turns sums into means, variances and covariance; :func:`finish` turns
  moments into values, (effective) counts and stale flags; :func:`outputs` applies the
  minimum count, the stale rule and the clip to values computed elsewhere.
* :func:`uniform_correlation` — two-pass Pearson of NaN-free stacks (used on ranks).

The rolling fast path keeps centred cross products instead (:mod:`monitor.engine.rolling`).

Stale: a variance is zero when it is at most :data:`STALE_RATIO` times the raw second
moment about the shift. Rounding leaves about ``rows * 1e-16`` of the raw moment, while a
real return series is far above ``1e-11`` (its standard deviation would have to be a
million times smaller than its distance from the block mean). With ``mean=zero`` only an
exactly zero mean square is stale. Values are clipped to [-1, 1]; never inf.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from monitor.engine.layout import BoolArray, FloatArray, Layout

STALE_RATIO = 1e-11
"""Variance / raw second moment at or below which a series counts as constant."""


@dataclass
class Sums:
    """Weighted sums of every pair over its common days, arrays broadcasting to the output.

    Attributes
    ----------
    weight : sum of w over common days (the count for equal weights)
    weight2 : sum of w**2 (None: equal weights, same as ``weight``)
    left, right : sum of w * y of each side
    left_sq, right_sq : sum of w * y**2 of each side
    cross : sum of w * y_left * y_right
    """

    weight: FloatArray
    weight2: FloatArray | None
    left: FloatArray
    right: FloatArray
    left_sq: FloatArray
    right_sq: FloatArray
    cross: FloatArray

    def _map(self, fn: Callable[[FloatArray], FloatArray]) -> Sums:
        return Sums(
            weight=fn(self.weight),
            weight2=None if self.weight2 is None else fn(self.weight2),
            left=fn(self.left),
            right=fn(self.right),
            left_sq=fn(self.left_sq),
            right_sq=fn(self.right_sq),
            cross=fn(self.cross),
        )

    def day(self, c: int) -> Sums:
        """Day ``c`` of sums with a leading day axis (views)."""
        return self._map(lambda array: array[c])

    def copy(self) -> Sums:
        """Independent, writable copies of every field."""
        return self._map(np.array)

    def add(self, other: Sums) -> None:
        """Add ``other`` field by field, in place (``weight2`` only when both have it)."""
        self.weight += other.weight
        if self.weight2 is not None and other.weight2 is not None:
            self.weight2 += other.weight2
        self.left += other.left
        self.right += other.right
        self.left_sq += other.left_sq
        self.right_sq += other.right_sq
        self.cross += other.cross


@dataclass
class Moments:
    """Weighted moments of every pair over its common days (arrays broadcast to the output).

    Attributes
    ----------
    weight : float array
        Sum of weights over common days (the count when every weight is 1).
    weight2 : float array
        Sum of squared weights (Kish effective count = weight**2 / weight2).
    mean_left, mean_right : float array
        Weighted means of the shifted returns of each side (zeros for ``mean=zero``).
    var_left, var_right : float array
        Weighted variances (divided by ``weight``), or mean squares for ``mean=zero``.
    cov : float array
        Weighted covariance (or mean cross product for ``mean=zero``).
    """

    weight: FloatArray
    weight2: FloatArray
    mean_left: FloatArray
    mean_right: FloatArray
    var_left: FloatArray
    var_right: FloatArray
    cov: FloatArray


def _day_scalar(values: FloatArray, layout: Layout) -> FloatArray:
    """(days,) -> (days, 1, ...) broadcasting against (days, *layout.shape)."""
    return values.reshape(values.shape + (1,) * len(layout.shape))


def _day_weights(weights: FloatArray, stack: FloatArray) -> FloatArray:
    """Row weights (W,) or (days, W) as (days, W)."""
    return np.broadcast_to(weights, (stack.shape[0], stack.shape[2]))


def uniform_sums(
    layout: Layout,
    left: FloatArray,
    right: FloatArray | None,
    weights: FloatArray | None,
    *,
    squares: bool = True,
) -> Sums:
    """Sums of NaN-free stacks: per-instrument ``left``/``left_sq``, per-pair ``cross``.

    Parameters
    ----------
    layout : Layout
    left : (days, K_left, W) float array, no NaN
    right : (days, K_right, W) float array, no NaN, or None for a symmetric tile
    weights : (W,) or (days, W) float array, or None for equal weights
    squares : bool
        Compute ``weight2`` (needed for the Kish count of unequal weights).

    Returns
    -------
    Sums
        ``weight`` (days, 1, ...), ``left``/``left_sq`` lifted by ``layout.left``,
        ``right``/``right_sq`` by ``layout.right``, ``cross`` (days, *layout.shape).
    """
    if weights is None:
        total = np.full(left.shape[0], float(left.shape[2]))
        total2 = None
        w_left = left
    else:
        w = _day_weights(weights, left)
        total = w.sum(axis=1)
        total2 = (w * w).sum(axis=1) if squares else None
        w_left = left * w[:, None, :]
    s_left = w_left.sum(axis=2)
    q_left = np.einsum("ckw,ckw->ck", w_left, left)
    if right is None:
        s_right, q_right, other = s_left, q_left, left
    else:
        w_right = right if weights is None else right * w[:, None, :]
        s_right = w_right.sum(axis=2)
        q_right = np.einsum("ckw,ckw->ck", w_right, right)
        other = right
    return Sums(
        weight=_day_scalar(total, layout),
        weight2=None if total2 is None else _day_scalar(total2, layout),
        left=layout.left(s_left),
        right=layout.right(s_right),
        left_sq=layout.left(q_left),
        right_sq=layout.right(q_right),
        cross=layout.cross(w_left, other),
    )


def masked_sums(
    layout: Layout,
    left: FloatArray,
    right: FloatArray,
    weights: FloatArray | None,
    *,
    squares: bool = True,
) -> Sums:
    """Pairwise-complete weighted sums of stacks with gaps.

    Parameters
    ----------
    left : (days, K_left, W) float array
        Shifted returns of the left instruments, NaN = missing.
    right : (days, K_right, W) float array
        Same for the right instruments (the same object for a symmetric tile).
    weights : (W,) or (days, W) float array, or None for equal weights
    squares : bool
        Compute ``weight2``.

    Returns
    -------
    Sums
        Every field (days, *layout.shape); a pair with no common day has all sums 0.
    """
    same = right is left and layout.symmetric
    mask_left = (~np.isnan(left)).astype(np.float64)
    y_left = np.where(mask_left > 0, left, 0.0)
    if same:
        mask_right, y_right = mask_left, y_left
    else:
        mask_right = (~np.isnan(right)).astype(np.float64)
        y_right = np.where(mask_right > 0, right, 0.0)
    if weights is None:
        w_mask_left, w_y_left = mask_left, y_left
        w2_mask_left = None
    else:
        w = _day_weights(weights, left)[:, None, :]
        w_mask_left, w_y_left = mask_left * w, y_left * w
        w2_mask_left = w_mask_left * w if squares else None

    # grouped by right factor: three products (two for a symmetric tile) instead of seven
    by_mask = [w_mask_left, w_y_left, w_y_left * y_left]
    if w2_mask_left is not None:
        by_mask.append(w2_mask_left)
    on_mask = layout.cross_many(by_mask, mask_right)
    s0, s_left, s_left_sq = on_mask[:3]
    if same:
        s_cross = layout.cross(w_y_left, y_right)
        s_right = np.swapaxes(s_left, -1, -2)
        s_right_sq = np.swapaxes(s_left_sq, -1, -2)
    else:
        s_cross, s_right = layout.cross_many([w_y_left, w_mask_left], y_right)
        s_right_sq = layout.cross(w_mask_left, y_right * y_right)
    return Sums(
        weight=s0,
        weight2=on_mask[3] if w2_mask_left is not None else None,
        left=s_left,
        right=s_right,
        left_sq=s_left_sq,
        right_sq=s_right_sq,
        cross=s_cross,
    )


def moments(sums: Sums, *, centred: bool) -> Moments:
    """Means, variances and covariance from sums (variances clamped at 0).

    The sums are of data shifted close to its mean, so the one-pass formulas
    ``Sxx / S0 - mean**2`` lose no significant digits (see the module docstring).
    """
    has = sums.weight > 0
    inv = np.divide(1.0, sums.weight, out=np.zeros(np.shape(sums.weight)), where=has)
    if centred:
        mean_left = sums.left * inv
        mean_right = sums.right * inv
        var_left = sums.left_sq * inv - mean_left * mean_left
        var_right = sums.right_sq * inv - mean_right * mean_right
        cov = sums.cross * inv
        cov -= mean_left * mean_right
        # one-pass formulas can leave a variance a rounding error below zero
        np.maximum(var_left, 0.0, out=var_left)
        np.maximum(var_right, 0.0, out=var_right)
    else:
        mean_left = np.zeros(np.shape(sums.left))
        mean_right = np.zeros(np.shape(sums.right))
        var_left = sums.left_sq * inv
        var_right = sums.right_sq * inv
        cov = sums.cross * inv
    # copies: the sums may be running totals that change on the next day
    weight = np.array(sums.weight)
    weight2 = weight if sums.weight2 is None else np.array(sums.weight2)
    return Moments(weight, weight2, mean_left, mean_right, var_left, var_right, cov)


def uniform_correlation(
    layout: Layout, left: FloatArray, right: FloatArray | None
) -> tuple[FloatArray, BoolArray, BoolArray]:
    """Two-pass equal-weight Pearson correlation of NaN-free window stacks.

    Parameters
    ----------
    layout : Layout
    left : (days, K_left, W) float array, no NaN
    right : (days, K_right, W) float array, or None for a symmetric tile

    Returns
    -------
    value : (days, *layout.shape) float array
        Clipped to [-1, 1]; NaN where either side is constant.
    flat_left : (days, K_left) bool
    flat_right : (days, K_right) bool
        Constant (zero variance) flags of each side.
    """

    def standardise(stack: FloatArray) -> tuple[FloatArray, BoolArray]:
        mean = stack.mean(axis=2)
        z = stack - mean[:, :, None]
        sumsq = np.einsum("ckw,ckw->ck", z, z)
        flat = sumsq <= STALE_RATIO * (sumsq + stack.shape[2] * mean * mean)
        z *= np.where(flat, 0.0, 1.0 / np.sqrt(np.where(flat, 1.0, sumsq)))[:, :, None]
        return z, flat

    z_left, flat_left = standardise(left)
    z_right, flat_right = (z_left, flat_left) if right is None else standardise(right)
    value = layout.cross(z_left, z_right)
    np.clip(value, -1.0, 1.0, out=value)
    if flat_left.any() or flat_right.any():
        bad = layout.left(flat_left) | layout.right(flat_right)
        value[np.broadcast_to(bad, value.shape)] = np.nan
    return value, flat_left, flat_right


def flat_flags(m: Moments, centred: bool) -> tuple[BoolArray, BoolArray]:
    """Zero-variance flags of the left and right sides of every pair (see module docstring)."""
    if centred:
        flat_left = m.var_left <= STALE_RATIO * (m.var_left + m.mean_left * m.mean_left)
        flat_right = m.var_right <= STALE_RATIO * (m.var_right + m.mean_right * m.mean_right)
    else:
        flat_left = m.var_left <= 0.0
        flat_right = m.var_right <= 0.0
    return flat_left, flat_right


def effective_count(m: Moments) -> FloatArray:
    """Kish effective count ``weight**2 / weight2`` (the count for equal weights); 0 if empty."""
    if m.weight2 is m.weight:
        return m.weight
    return np.divide(
        m.weight * m.weight, m.weight2, out=np.zeros(np.shape(m.weight)), where=m.weight2 > 0
    )


def constant(
    value: float | bool, shape: tuple[int, ...], dtype: type = np.float64
) -> npt.NDArray[Any]:
    """A read-only array of ``shape`` holding one value (zero strides, nothing allocated)."""
    cell: npt.NDArray[Any] = np.array([value], dtype=dtype)
    out: npt.NDArray[Any] = np.ndarray(shape, dtype=dtype, buffer=cell, strides=(0,) * len(shape))
    out.flags.writeable = False
    return out


def outputs(
    value: FloatArray,
    n: FloatArray | np.float64,
    flat_left: BoolArray,
    flat_right: BoolArray,
    shape: tuple[int, ...],
    min_count: float,
) -> tuple[FloatArray, FloatArray, BoolArray]:
    """Apply the minimum count and the stale rule; shape the count and flag arrays."""
    np.clip(value, -1.0, 1.0, out=value)
    # a tolerance so that an effective count equal to the minimum up to rounding passes
    enough = n >= min_count * (1.0 - 1e-12)
    any_flat = bool(flat_left.any() or flat_right.any())
    all_enough = bool(np.all(enough))
    stale: BoolArray
    if any_flat:
        stale = np.broadcast_to(enough & (flat_left | flat_right), shape)
    else:
        stale = constant(False, shape, np.bool_)
    if any_flat or not all_enough:
        value[np.broadcast_to(stale | ~enough, shape)] = np.nan
    if isinstance(n, np.ndarray) and n.shape == shape and not n.flags.writeable:
        n_out = n  # already a read-only array of the right shape
    elif np.size(n) == 1:
        n_out = constant(float(np.reshape(n, -1)[0]), shape)
    else:
        n_out = np.broadcast_to(n, shape)
    return value, n_out, stale


def finish(
    m: Moments,
    shape: tuple[int, ...],
    *,
    centred: bool,
    min_count: float,
    flat: tuple[BoolArray, BoolArray] | None = None,
) -> tuple[FloatArray, FloatArray, BoolArray]:
    """Correlation, (effective) count and stale flag from moments.

    Parameters
    ----------
    m : Moments
        Fields broadcastable to ``shape``; ``m.cov`` has the full ``shape``.
    shape : tuple of int
        Output shape, e.g. (days, I, J) or (I, J).
    centred : bool
    min_count : float
        Values with a count below this are NaN (and not stale).
    flat : (left, right) bool arrays broadcasting to ``shape``, or None
        Sides known to be constant (an exact test), added to the variance test.

    Returns
    -------
    value : float array ``shape``
        In [-1, 1]; NaN below the minimum count or where a side has zero variance.
    n : float array ``shape`` (a read-only broadcast when it is one number)
    stale : bool array ``shape`` (likewise)
        True where the count is sufficient but a side has zero variance.
    """
    n = effective_count(m)
    flat_left, flat_right = flat_flags(m, centred)
    if flat is not None:
        flat_left = flat_left | flat[0]
        flat_right = flat_right | flat[1]
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_left = 1.0 / np.sqrt(m.var_left)
        inv_right = 1.0 / np.sqrt(m.var_right)
        value = np.multiply(m.cov, inv_left)
        value *= inv_right
    if value.shape != shape:
        value = np.broadcast_to(value, shape).copy()
    return outputs(value, n, flat_left, flat_right, shape, min_count)
