"""Is a pair's correlation now different from before? Fisher z tests of a shift.

Two comparisons, both on rolling Pearson values of every requested pair at one day:

* nested — a short window inside a long one (both end on the same day). The windows share
  data, so their z-values are not independent; the variance of ``z_short - z_long`` is
  about ``1/(n_short - 3) - 1/(n_long - 3)``, and
  ``z = (atanh r_short - atanh r_long) / sqrt(1/(n_short-3) - 1/(n_long-3))``.
* adjacent — the latest W days against the W days before them (independent windows):
  ``z = (atanh r1 - atanh r2) / sqrt(1/(n1-3) + 1/(n2-3))`` (Fisher 1921; the
  difference-of-correlations test of, e.g., the R package psych, ``r.test``).

Each gives z and a two-sided p-value ``2 (1 - Phi(|z|))``. A value of exactly +-1 gives an
infinite z (p = 0); a missing value or a count of 3 or less gives NaN.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor.engine.layout import FloatArray
from monitor.engine.stream import DayResult, as_returns, one_day
from monitor.errors import EngineInputError

_erfc = np.frompyfunc(math.erfc, 1, 1)


def two_sided_p(z: npt.ArrayLike) -> FloatArray:
    """Two-sided standard normal p-value ``erfc(|z| / sqrt 2)``; NaN stays NaN.

    ``math.erfc`` elementwise: exact to double precision in the far tail, where
    ``1 - Phi`` would round to 0.
    """
    magnitude = np.abs(np.asarray(z, dtype=np.float64)) / math.sqrt(2.0)
    return np.asarray(_erfc(magnitude), dtype=np.float64)


def _atanh(r: FloatArray) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.arctanh(r)


def independent_z(
    r1: npt.ArrayLike, n1: npt.ArrayLike, r2: npt.ArrayLike, n2: npt.ArrayLike
) -> FloatArray:
    """z of the difference of two correlations from independent samples (arrays broadcast)."""
    a, b = np.asarray(r1, dtype=np.float64), np.asarray(r2, dtype=np.float64)
    m1, m2 = np.asarray(n1, dtype=np.float64), np.asarray(n2, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        variance = np.where((m1 > 3) & (m2 > 3), 1.0 / (m1 - 3.0) + 1.0 / (m2 - 3.0), np.nan)
        return (_atanh(a) - _atanh(b)) / np.sqrt(variance)


def nested_z(
    r_short: npt.ArrayLike, n_short: npt.ArrayLike, r_long: npt.ArrayLike, n_long: npt.ArrayLike
) -> FloatArray:
    """z of a short-window correlation against the long window that contains it.

    NaN unless ``3 < n_short < n_long``.
    """
    a, b = np.asarray(r_short, dtype=np.float64), np.asarray(r_long, dtype=np.float64)
    ms, ml = np.asarray(n_short, dtype=np.float64), np.asarray(n_long, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        ok = (ms > 3) & (ml > ms)
        variance = np.where(ok, 1.0 / (ms - 3.0) - 1.0 / (ml - 3.0), np.nan)
        return (_atanh(a) - _atanh(b)) / np.sqrt(variance)


@dataclass(frozen=True, eq=False)
class ShiftResult:
    """A shift test for every requested pair at one day; arrays share one shape.

    Attributes
    ----------
    z, p : float arrays
        Test statistic and two-sided p-value.
    recent, recent_n : float arrays
        Correlation and count of the recent (short, or latest) window.
    reference, reference_n : float arrays
        Correlation and count of the long (or previous) window.
    """

    z: FloatArray
    p: FloatArray
    recent: FloatArray
    recent_n: FloatArray
    reference: FloatArray
    reference_n: FloatArray


def _check_window(name: str, value: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 4:
        raise EngineInputError(f"shift {name} window must be a whole number >= 4, got {value!r}")
    return int(value)


def _result(z: FloatArray, recent: DayResult, reference: DayResult | None) -> ShiftResult:
    if reference is None:
        empty = np.full(recent.value.shape, np.nan)
        return ShiftResult(z, two_sided_p(z), recent.value, recent.n, empty, np.zeros_like(empty))
    return ShiftResult(z, two_sided_p(z), recent.value, recent.n, reference.value, reference.n)


def nested_shift(
    returns: npt.ArrayLike,
    t: int,
    *,
    short: int,
    long: int,
    pairs: npt.ArrayLike | None = None,
) -> ShiftResult:
    """Short window against the long window ending on the same day ``t``.

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    t : int
        Day (row); negative counts from the end.
    short, long : int
        Window lengths, ``4 <= short < long``; each needs its full count of common returns.
    pairs : (P, 2) int array or None
        None: (N, N) arrays.

    Raises
    ------
    EngineInputError
        Bad window lengths.
    """
    short = _check_window("short", short)
    long = _check_window("long", long)
    if short >= long:
        raise EngineInputError(f"shift short window must be < long window, got {short} and {long}")
    matrix = as_returns(returns)
    recent = one_day(matrix, f"rolling:{short}", t, pairs=pairs)
    reference = one_day(matrix, f"rolling:{long}", t, pairs=pairs)
    z = nested_z(recent.value, recent.n, reference.value, reference.n)
    return _result(z, recent, reference)


def adjacent_shift(
    returns: npt.ArrayLike,
    t: int,
    *,
    window: int,
    pairs: npt.ArrayLike | None = None,
) -> ShiftResult:
    """The ``window`` days ending at ``t`` against the ``window`` days before them.

    Parameters
    ----------
    returns : (T, N) float array
    t : int
        Day (row); negative counts from the end.
    window : int
        Length of each window, >= 4; each needs its full count of common returns.
    pairs : (P, 2) int array or None

    Returns
    -------
    ShiftResult
        ``reference`` is NaN (count 0) where the previous window would start before row 0.
    """
    window = _check_window("adjacent", window)
    matrix = as_returns(returns)
    day = t + matrix.shape[0] if t < 0 else t
    recent = one_day(matrix, f"rolling:{window}", day, pairs=pairs)
    if day - window < 0:
        z = np.full(recent.value.shape, np.nan)
        return _result(z, recent, None)
    reference = one_day(matrix, f"rolling:{window}", day - window, pairs=pairs)
    z = independent_z(recent.value, recent.n, reference.value, reference.n)
    return _result(z, recent, reference)
