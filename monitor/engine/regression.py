"""Regression measures of a pair A/B (``beta:...``, ``r2:...``): B's returns on A's, with a
constant, over the window (or with the EWMA weights) of the Pearson measure they come from.

For one regressor with a constant, ordinary least squares gives

* slope ``beta = cov(A, B) / var(A) = r * sd(B) / sd(A)``,
* ``R^2 = r^2``,
* standard error of the slope ``se = |sd(B) / sd(A)| * sqrt((1 - r^2) / (n - 2))``
  (any regression text, e.g. Greene, Econometric Analysis, ch. 4; with EWMA weights ``n``
  is the Kish effective count, an approximation).

So the engine computes ``r`` as for ``rolling:W`` / ``ewma:...`` and each side's variance
over the same rows and weights (:func:`side_variances`, on a pair set's block, where every
column has a return on every row: the pair's own dates, see :mod:`monitor.engine.pairdates`).

Bands: ``beta +- z * se`` (normal quantile at the level); for ``r2`` the Fisher z band of
``r`` squared (``[0, max]`` when the band of ``r`` holds 0). Both are large-sample bands.
"""

from __future__ import annotations

import numpy as np

from monitor._typing import Returns2D
from monitor.engine.bands import fisher_band, normal_quantile
from monitor.engine.layout import FloatArray
from monitor.engine.spec import Measure


def side_variances(block: Returns2D, measure: Measure) -> FloatArray:
    """(R, C): each column's variance (up to a factor common to every column) over the
    measure's window, or EWMA weights, ending on each row of a block without gaps.

    Rolling: ``sum x^2 - (sum x)^2 / n`` over the trailing ``W`` rows (fewer at the start),
    from running sums of the mean-shifted columns.
    EWMA: ``sum w x^2 - (sum w x)^2 / sum w`` with ``w = lambda^age`` (``sum w x^2`` for
    ``mean=zero``), running sums over the rows so far.
    """
    values = np.asarray(block, dtype=np.float64)
    rows, columns = values.shape
    out = np.empty((rows, columns))
    if rows == 0:
        return out
    if measure.kind == "ewma":
        lam = float(measure.lam or 0.0)
        weight = np.zeros(1)
        first = np.zeros(columns)
        second = np.zeros(columns)
        for t in range(rows):
            x = values[t]
            weight = lam * weight + 1.0
            first = lam * first + x
            second = lam * second + x * x
            out[t] = second if not measure.centred else second - first * first / weight
        return np.maximum(out, 0.0)
    # Each column shifted by its mean (the variance does not change) so that the running
    # sums stay near the window sums' size: the difference of two running sums then loses
    # about T / W units in the last place, far below 1e-10 of the variance.
    window = int(measure.window or rows)
    shifted = values - values.mean(axis=0)
    first = np.vstack([np.zeros((1, columns)), np.cumsum(shifted, axis=0)])
    second = np.vstack([np.zeros((1, columns)), np.cumsum(shifted * shifted, axis=0)])
    end = np.arange(1, rows + 1)
    begin = np.maximum(end - window, 0)
    count = (end - begin)[:, None].astype(np.float64)
    total = first[end] - first[begin]
    out = (second[end] - second[begin]) - total * total / count
    return np.maximum(out, 0.0)


def regression_values(r: FloatArray, var_a: FloatArray, var_b: FloatArray,
                      measure: Measure) -> tuple[FloatArray, FloatArray]:
    """(value, ratio): the measure's number from ``r`` and the sides' variances, and
    ``sd(B) / sd(A)`` (NaN where A has no variance)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(var_a > 0.0, np.sqrt(var_b / var_a), np.nan)
    if measure.output == "r2":
        return r * r, ratio
    return r * ratio, ratio


def regression_band(measure: Measure, value: FloatArray, r: FloatArray, ratio: FloatArray,
                    n: FloatArray, level: float) -> tuple[FloatArray, FloatArray]:
    """Band ``(low, high)`` of a ``beta`` or ``r2`` value (see the module docstring); NaN
    where ``n <= 3``."""
    if measure.output == "r2":
        low_r, high_r = fisher_band(r, n, level)
        low = np.where(low_r * high_r <= 0.0, 0.0, np.minimum(low_r ** 2, high_r ** 2))
        high = np.maximum(low_r ** 2, high_r ** 2)
        nan = np.isnan(low_r) | np.isnan(high_r)
        return np.where(nan, np.nan, low), np.where(nan, np.nan, high)
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.abs(ratio) * np.sqrt(np.maximum(1.0 - r * r, 0.0) / (n - 2.0))
        se = np.where(n > 3.0, se, np.nan)
    half = normal_quantile(level) * se
    return value - half, value + half
