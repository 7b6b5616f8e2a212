"""Confidence bands of a correlation: Fisher's z-transform.

Fisher (1915, 1921): ``z = atanh(r)`` is close to normal with standard error
``1 / sqrt(n - 3)``, so the band at level ``p`` is ``tanh(z -+ q se)`` with
``q = Phi^-1((1 + p) / 2)``. For an EWMA the Kish effective count stands in for ``n``; for
Spearman the same standard error is used as an approximation.

With ``s = tanh(q se)`` the band is computed as ``(r - s) / (1 - r s)`` and
``(r + s) / (1 + r s)`` (the addition formula of tanh), which needs no atanh and stays
finite at ``r = +-1``.
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import numpy.typing as npt

from monitor.engine.layout import FloatArray
from monitor.errors import EngineInputError

DEFAULT_LEVEL = 0.95


def check_level(level: float) -> float:
    """Validate a confidence level; raises EngineInputError unless ``0 < level < 1``."""
    try:
        value = float(level)
    except (TypeError, ValueError):
        raise EngineInputError(
            f"confidence level must be a number in (0, 1), got {level!r}") from None
    if not 0.0 < value < 1.0:
        raise EngineInputError(f"confidence level must be in (0, 1), got {level!r}")
    return value


def normal_quantile(level: float) -> float:
    """Two-sided standard normal quantile ``Phi^-1((1 + level) / 2)`` (1.959964 for 0.95)."""
    return NormalDist().inv_cdf((1.0 + check_level(level)) / 2.0)


def fisher_band(
    value: npt.ArrayLike, n: npt.ArrayLike, level: float = DEFAULT_LEVEL
) -> tuple[FloatArray, FloatArray]:
    """Fisher z confidence band of correlations.

    Parameters
    ----------
    value : float array
        Correlations in [-1, 1]; NaN gives a NaN band.
    n : float array, broadcastable to ``value``
        Observation count or effective count; the band is NaN where ``n <= 3``.
    level : float
        Confidence level in (0, 1).

    Returns
    -------
    low, high : float arrays, shape of ``value`` broadcast with ``n``
    """
    q = normal_quantile(level)
    r = np.asarray(value, dtype=np.float64)
    count = np.asarray(n, dtype=np.float64)
    if count.ndim and count.size and not any(count.strides):
        # a broadcast constant count (the fast path): one tanh instead of one per pair
        count = np.asarray(count.flat[0])
    elif count.ndim and count.size > 64:
        # Gap-free windows give every pair the same count: detect it with two cheap
        # reductions and take the same one-tanh path (NaN counts fail the test).
        with np.errstate(invalid="ignore"):
            first = count.flat[0]
            if np.isfinite(first) and count.min() == first == count.max():
                count = np.asarray(first)
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.where(count > 3.0, 1.0 / np.sqrt(count - 3.0), np.nan)
        s = np.tanh(q * se)
        low = (r - s) / (1.0 - r * s)
        high = (r + s) / (1.0 + r * s)
    return low, high
