"""Opening thresholds of the shift test calibrated to a stated false-alarm rate.

The shift statistic of one pair is, to first order, a standardised linear filter of per-day
contributions (the delta-method influence of each day on the correlation, a martingale
difference when nothing changes)::

    nested:   Z_t ~ mean of the short window - mean of the long window
    adjacent: Z_t ~ mean of the latest window - mean of the window before it

so it is a stationary sequence, close to Gaussian, whose lag-1 autocorrelation ``rho1``
follows from the window geometry alone (:func:`lag_one_autocorrelation` of the filter's
weights). The expected number of upcrossings of a level ``u`` per day by a stationary
Gaussian sequence is exactly ``P(Z_{t-1} <= u < Z_t)`` (a bivariate normal probability,
computed here by Gauss-Legendre quadrature); the two-sided test doubles it by symmetry.
The threshold solves ``days_per_year * 2 * P(Z_{t-1} <= u < Z_t) = false_alarms``.

Tails: the statistic is a weighted sum of per-day influences, which are not normal even for
normal returns (the influence of one day on r, ``x y - (rho/2)(x^2 + y^2)``, has kurtosis 9
for bivariate normal days whatever rho: common practice, checked by simulation in
tests/rules/test_calibration.py). The cumulant of a linear filter gives the statistic an
excess kurtosis ``6 sum w^4 / (sum w^2)^2`` (0.2 for 21 days nested in 126, 0.05 for
adjacent 63-day windows; window measures only, see :func:`shift_threshold`); at a level
near 4 that doubles the upcrossings of a 21-day short
window (simulated: 19 to 24 openings per 1,000 pair-years where 10 were asked). So the
upcrossing probability is averaged over a Gaussian scale mixture whose log-normal variance
``V`` (mean 1, the same on consecutive days) has that kurtosis,
``3 E[V^2] = 3 + kappa``, by 24-point Gauss-Hermite quadrature; a log-normal mixture has
heavier tails than a Gamma one of the same kurtosis, so the level errs on the safe side.

An alert opens only on a day ``|Z|`` goes from at most ``u`` to above it (after a clear
below ``clear_z < u``, and ``hold`` days later), so openings are at most the upcrossings
of ``|Z|``, which are at most the two one-sided counts: the stated rate is an upper bound
on the expected openings per pair per year (common practice: the level-crossing count of
a discretely observed Gaussian sequence; the formula itself is elementary).
"""

from __future__ import annotations

import functools
import math

import numpy as np

from monitor.engine.spec import Measure

DAYS_PER_YEAR = 252
"""Business days in a year (common practice)."""

_NODES, _WEIGHTS = np.polynomial.legendre.leggauss(64)
_MIX_NODES, _MIX_WEIGHTS = np.polynomial.hermite_e.hermegauss(24)
_MIX_WEIGHTS = _MIX_WEIGHTS / _MIX_WEIGHTS.sum()
NORMAL_INFLUENCE_EXCESS_KURTOSIS = 6.0
"""Excess kurtosis of one normal day's influence on r (kurtosis 9, whatever rho)."""
_erfc = np.frompyfunc(math.erfc, 1, 1)
_EWMA_TAIL = 1e-12
"""EWMA filter weights are truncated once the long decay's weight falls below this."""


def _normal_cdf(x: np.ndarray) -> np.ndarray:
    return 0.5 * np.asarray(_erfc(-x / math.sqrt(2.0)), dtype=np.float64)


def upcrossing_probability(u: float, rho1: float) -> float:
    """``P(Z_{t-1} <= u < Z_t)`` for standard bivariate normal ``(Z_{t-1}, Z_t)``.

    Parameters
    ----------
    u : float
        The level.
    rho1 : float
        Correlation of consecutive values, ``-1 < rho1 < 1``.

    Returns
    -------
    float
        ``integral_u^inf phi(x) Phi((u - rho1 x) / sqrt(1 - rho1^2)) dx``, by 64-point
        Gauss-Legendre quadrature on each of 32 panels covering ``[u, u + 10]`` (the
        normal density beyond is below 1e-22 of its value at u).
    """
    scale = math.sqrt(1.0 - rho1 * rho1)
    edges = np.linspace(u, u + 10.0, 33)
    half = np.diff(edges)[:, None] / 2.0
    x = (edges[:-1, None] + half) + half * _NODES[None, :]
    density = np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)
    integrand = density * _normal_cdf((u - rho1 * x) / scale)
    return float(np.sum(half * _WEIGHTS[None, :] * integrand))


def mixture_upcrossing_probability(u: float, rho1: float, excess_kurtosis: float) -> float:
    """``P(Z_{t-1} <= u < Z_t)`` for ``Z = sqrt(V) G``: ``G`` a stationary Gaussian sequence
    of lag-1 correlation ``rho1``, ``V`` log-normal with mean 1 and ``3 E[V^2] = 3 +
    excess_kurtosis``, the same on both days.

    Parameters
    ----------
    u : float
        The level.
    rho1 : float
        Correlation of consecutive values of ``G``.
    excess_kurtosis : float
        Excess kurtosis of ``Z`` (>= 0); 0 gives :func:`upcrossing_probability`.
    """
    if excess_kurtosis <= 0.0:
        return upcrossing_probability(u, rho1)
    spread = math.log1p(excess_kurtosis / 3.0)
    scales = np.exp(math.sqrt(spread) * _MIX_NODES - spread / 2.0)
    return float(sum(weight * upcrossing_probability(u / math.sqrt(scale), rho1)
                     for scale, weight in zip(scales, _MIX_WEIGHTS, strict=True)))


def filter_excess_kurtosis(weights: np.ndarray,
                           daily: float = NORMAL_INFLUENCE_EXCESS_KURTOSIS) -> float:
    """Excess kurtosis of ``sum_k w_k e_{t-k}`` for iid ``e`` of excess kurtosis ``daily``:
    ``daily * sum w^4 / (sum w^2)^2`` (the fourth cumulant of a linear filter)."""
    w = np.asarray(weights, dtype=np.float64)
    return float(daily * np.sum(w**4) / np.sum(w * w) ** 2)


@functools.lru_cache(maxsize=256)
def threshold_for_rate(
    false_alarms: float, rho1: float, *, days_per_year: int = DAYS_PER_YEAR,
    excess_kurtosis: float = 0.0,
) -> float:
    """The level ``u`` with ``days_per_year * 2 * P(Z_{t-1} <= u < Z_t) = false_alarms``.

    Parameters
    ----------
    false_alarms : float
        Expected two-sided upcrossings per year, ``0 < false_alarms < days_per_year``.
    rho1 : float
        Lag-1 autocorrelation of the statistic.
    excess_kurtosis : float
        Of the statistic; above 0 the probability is
        :func:`mixture_upcrossing_probability`.

    Returns
    -------
    float
        ``u``, found by bisection on ``[0, 40]`` to 1e-10.
    """
    target = false_alarms / (2.0 * days_per_year)
    low, high = 0.0, 40.0
    while high - low > 1e-10:
        middle = 0.5 * (low + high)
        if mixture_upcrossing_probability(middle, rho1, excess_kurtosis) > target:
            low = middle
        else:
            high = middle
    return 0.5 * (low + high)


def lag_one_autocorrelation(weights: np.ndarray) -> float:
    """Lag-1 autocorrelation of ``Z_t = sum_k w_k e_{t-k}`` for uncorrelated ``e``.

    Parameters
    ----------
    weights : float array (K,)
        ``w_k`` for lags 0 .. K-1 (not all zero).
    """
    w = np.asarray(weights, dtype=np.float64)
    return float(np.dot(w[1:], w[:-1]) / np.dot(w, w))


def _measure_weights(measure: Measure, length: int) -> np.ndarray:
    """Weights of a measure's mean over the last ``length`` days (lag 0 first)."""
    weights = np.zeros(length)
    if measure.window is not None:
        weights[: measure.window] = 1.0 / measure.window
    else:
        lam = float(measure.lam or 0.0)
        weights[:] = (1.0 - lam) * lam ** np.arange(length)
    return weights


def _memory(measure: Measure) -> int:
    if measure.window is not None:
        return measure.window
    lam = float(measure.lam or 0.0)
    return int(math.ceil(math.log(_EWMA_TAIL) / math.log(lam)))


def nested_weights(short: Measure, long: Measure) -> np.ndarray:
    """Filter of the nested statistic: the short measure's weights minus the long one's."""
    length = max(_memory(short), _memory(long))
    return _measure_weights(short, length) - _measure_weights(long, length)


def adjacent_weights(window: int) -> np.ndarray:
    """Filter of the adjacent statistic: the latest ``window`` days minus the ones before."""
    return np.concatenate([np.full(window, 1.0 / window), np.full(window, -1.0 / window)])


def shift_threshold(
    false_alarms: float, short: Measure, long: Measure | None
) -> tuple[float, float]:
    """Calibrated opening threshold of a shift test and the statistic's lag-1 correlation.

    Parameters
    ----------
    false_alarms : float
        Expected false alerts per pair per year, in (0, 1).
    short : Measure
        The recent measure (``measure``).
    long : Measure or None
        The long measure of a nested test; None for the adjacent test (``short`` then has
        a window).

    Returns
    -------
    (u, rho1) : tuple of float
        ``u`` allows for the statistic's excess kurtosis on normal days
        (:func:`filter_excess_kurtosis` of the filter) for window measures.
    """
    if long is None:
        if short.window is None:
            raise ValueError("the adjacent test needs a window measure")
        weights = adjacent_weights(short.window)
    else:
        weights = nested_weights(short, long)
    rho1 = lag_one_autocorrelation(weights)
    # Window measures only: simulated EWMA nested statistics (hl=10 in hl=60, normal days)
    # have kurtosis 3.0 and a standard deviation of 0.80 (the Kish count already errs
    # wide), so the Gaussian level holds for them without the tail allowance.
    kurtosis = filter_excess_kurtosis(weights) if short.window is not None else 0.0
    return threshold_for_rate(false_alarms, rho1, excess_kurtosis=kurtosis), rho1
