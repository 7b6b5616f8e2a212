"""The sequential change statistic of the ``cusum`` rule, its boundary and Lorden's floor.

The statistic (per pair and day, on volatility-standardised returns)
--------------------------------------------------------------------
A window of ``baseline + horizon`` rows ends today. The first ``baseline`` rows give the
reference: the pair's means, standard deviations and correlation ``rho0`` (pairwise
complete rows). The last ``horizon`` rows are standardised with those means and
deviations, ``u`` and ``v``, and each row contributes the log-likelihood ratio of a
unit-variance bivariate Student t (``nu`` = :data:`LIKELIHOOD_DF` degrees of freedom)
with correlation ``rho1`` against one with ``rho0``::

    l = 0.5 log((1 - rho0^2) / (1 - rho1^2))
        - (nu + 2) / 2 [log(1 + Q(rho1) / (nu - 2)) - log(1 + Q(rho0) / (nu - 2))]
    Q(rho) = (u^2 - 2 rho u v + v^2) / (1 - rho^2)

(the normal likelihood ratio is the limit nu -> infinity). The normal ratio was tried
first: on fat-tailed standardised returns single wild days dominate its sums, its
false-alarm rate falls only slowly with ``h`` and the calibrated boundary came out near
31 instead of 13, with much longer delays; the t ratio grows only logarithmically in a
day's size.

The window-limited CUSUM (Page 1954, Biometrika 41; window limitation as in Lai 1995,
JRSS B 57, from memory) is ``S = max(0, max_s sum_{k >= s} l_k)`` over the starts ``s``
in the horizon, computed for ``rho1 = rho0 +- change`` and ``rho0 +- 2 change``
(:data:`ALTERNATIVES`, all clipped to +-``RHO_LIMIT``); the largest of the four counts.
The start of the maximising sum is the most likely change point. Comparing a monitoring
window with a reference stretch that precedes it is the set-up of Wied & Galeano (2013,
Journal of Statistical Planning and Inference), here with a likelihood-ratio CUSUM
instead of their fluctuation statistic.

Because everything is a function of the trailing window, a rerun or a resumed backfill
gives the same values. Once a change is older than ``horizon`` rows, its rows enter the
baseline, so the reference moves onto the new regime: this is the restart after an alert.

The boundary
------------
CUSUM run lengths grow roughly exponentially in the boundary ``h`` (Siegmund 1985,
Sequential Analysis, ch. II, from memory), so ``log(rate of openings)`` is close to linear in ``h``.
:func:`boundary` simulates this exact statistic on seeded returns
with fat tails and volatility clustering (bivariate Student t shocks with 4 degrees of
freedom under a GARCH(1,1) volatility, standardised by the production
:func:`monitor.engine.scaling.standardise`; conservative for lighter tails), counts alert
openings per pair-year over a grid of ``h`` where they are frequent, fits the line
and solves it for the stated rate. The seed is fixed, so every process finds the same
``h``; the result is cached per setting.

Lorden's floor
--------------
No detector with a mean time between false alarms of ``ARL0`` days can detect a change
of Kullback-Leibler information ``K`` per day faster, in the worst case, than about
``log(ARL0) / K`` days (Lorden 1971, Annals of Mathematical Statistics 42);
:func:`lorden_floor` gives that figure for a change ``rho0 -> rho1``.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor._typing import Float1D
from monitor.engine.scaling import standardise

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

LIKELIHOOD_DF = 4.0
"""Degrees of freedom of the Student t likelihood behind the increments: daily returns,
even volatility-standardised, have tails like a t with 3 to 6 degrees of freedom (common
practice); the normal likelihood lets single fat-tailed days dominate the sum."""
RHO_LIMIT = 0.95
"""Correlations in the likelihood are clipped to +-0.95 so that 1 - rho^2 stays away from 0."""
ALTERNATIVES = (1.0, 2.0)
"""Each side runs one CUSUM tuned to ``change`` and one tuned to twice ``change``: a small
change is found by the first, a large one much sooner by the second."""
CLEAR_FRACTION = 0.5
"""An open alert clears when the evidence falls below this fraction of the boundary."""
BUSINESS_DAYS_PER_YEAR = 252
"""Common practice."""
MIN_BASELINE_FRACTION = 0.5
"""A baseline with fewer complete rows than this share of ``baseline`` gives no decision."""

CALIBRATION_SEED = 20260512
"""Fixed, so the boundary (and thus every alert) is the same in every process."""
CALIBRATION_DF = 4.0
"""Student t degrees of freedom of the calibration shocks."""
CALIBRATION_CAP = 4.0
"""The calibration shocks are capped like ``standardise`` caps (its default cap)."""
GARCH_ALPHA, GARCH_BETA = 0.10, 0.85
"""Calibration volatility: persistence 0.95 with a large reaction (alpha), which the
0.94 EWMA of ``standardise`` follows less well than a smoother path (typical daily
equity fits have alpha 0.05-0.10 and persistence 0.95-0.99: common practice)."""
WARM_UP_ROWS = 250
"""Rows dropped at the start of each simulated series while ``standardise`` fills up."""
CALIBRATION_RHOS = (0.0, 0.35, 0.7)
"""True correlations of the calibration pairs (equal shares): the rate is averaged over a
spread of typical desk correlations rather than fitted to one."""
CALIBRATION_PAIRS = 96
CALIBRATION_DAYS = 1600
"""Simulated per pair after the warm-up (about 6.3 years x 96 pairs = 600 pair-years)."""
MIN_FIT_OPENINGS = 15
"""Grid points with fewer simulated openings are too noisy to enter the fit."""


@dataclass(frozen=True)
class Evidence:
    """The statistic of one day for P pairs.

    Attributes
    ----------
    evidence : float array (P,)
        ``S``, the larger of the two one-sided window-limited CUSUMs (>= 0); NaN where the
        baseline has too few complete rows or the horizon has none.
    reference : float array (P,)
        ``rho0``, the baseline correlation; NaN where unknown.
    since_change : float array (P,)
        Pearson correlation of the horizon rows from the most likely change point to
        today; NaN when fewer than 3 complete rows (or ``evidence`` is 0).
    start : int array (P,)
        Row of the horizon (0 .. horizon-1) where the maximising sum starts; ``horizon``
        when the evidence is 0.
    """

    evidence: Float1D
    reference: Float1D
    since_change: Float1D
    start: IntArray


def _moments(x: FloatArray, y: FloatArray) -> tuple[FloatArray, ...]:
    """Count, means, standard deviations and correlation of columns (rows, P), pairwise
    complete; NaN where fewer than 3 complete rows or a zero variance."""
    both = np.isfinite(x) & np.isfinite(y)
    count = both.sum(axis=0).astype(np.float64)
    xs = np.where(both, x, 0.0)
    ys = np.where(both, y, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_x = xs.sum(axis=0) / count
        mean_y = ys.sum(axis=0) / count
        # Centred two-pass sums: standardised values are O(1), so this is accurate.
        dx = np.where(both, x - mean_x, 0.0)
        dy = np.where(both, y - mean_y, 0.0)
        sxx = np.einsum("ij,ij->j", dx, dx)
        syy = np.einsum("ij,ij->j", dy, dy)
        sxy = np.einsum("ij,ij->j", dx, dy)
        sd_x = np.sqrt(sxx / count)
        sd_y = np.sqrt(syy / count)
        rho = np.clip(sxy / np.sqrt(sxx * syy), -1.0, 1.0)
    bad = (count < 3) | ~(sxx > 0) | ~(syy > 0)
    rho[bad] = np.nan
    return count, mean_x, mean_y, sd_x, sd_y, rho


def _log_kernel(a: FloatArray, b: FloatArray, rho: Float1D) -> FloatArray:
    """``(nu + 2) / 2 log(1 + Q / (nu - 2))`` per row (H, P), Q the squared Mahalanobis
    distance of (u, v) under correlation ``rho``: the variable part of minus the
    log-density of the unit-variance bivariate t."""
    q = 1.0 - rho * rho
    with np.errstate(invalid="ignore"):
        return 0.5 * (LIKELIHOOD_DF + 2.0) * np.log1p(
            (a - 2.0 * rho * b) / (q * (LIKELIHOOD_DF - 2.0)))


def _one_sided(a: FloatArray, null: FloatArray, rho0: Float1D, rho1: Float1D,
               b: FloatArray) -> tuple[FloatArray, IntArray]:
    """Window-limited CUSUM of the log-likelihood ratios (H, P) of ``rho1`` against
    ``rho0`` (``null`` = the kernel under ``rho0``): the best sum ending today and its
    start (H where no sum is positive)."""
    # log f1 - log f0 of the unit-variance bivariate t: the day's squared Mahalanobis
    # distance enters through a logarithm, so one wild day cannot swamp the sum.
    increments = 0.5 * np.log((1.0 - rho0 * rho0) / (1.0 - rho1 * rho1)) + (
        null - _log_kernel(a, b, rho1))
    # a and b are NaN on incomplete rows; those rows add nothing.
    increments = np.where(np.isnan(a), 0.0, increments)
    # Sums from each start s to the last row: a cumulative sum of the reversed rows.
    tails = np.cumsum(increments[::-1], axis=0)[::-1]
    best = np.argmax(tails, axis=0)
    value = np.take_along_axis(tails, best[None, :], axis=0)[0]
    horizon = a.shape[0]
    start = np.where(value > 0.0, best, horizon).astype(np.int64)
    return np.maximum(value, 0.0), start


def evidence(x: FloatArray, y: FloatArray, *, baseline: int, horizon: int,
             change: float) -> Evidence:
    """The ``cusum`` statistic of today for P pairs.

    Parameters
    ----------
    x, y : float arrays (L, P), L >= baseline + horizon
        Standardised returns of each pair's first and second instrument, last row =
        today; only the last ``baseline + horizon`` rows are read. NaN = missing: a row
        counts only where both are present.
    baseline, horizon : int
        Rows of the reference stretch and of the monitoring window.
    change : float
        Size of the correlation change each one-sided CUSUM is tuned to (> 0).

    Returns
    -------
    Evidence
        Arrays (P,); see :class:`Evidence` for the NaN cases.
    """
    rows = baseline + horizon
    x = np.asarray(x, dtype=np.float64)[-rows:]
    y = np.asarray(y, dtype=np.float64)[-rows:]
    count, mean_x, mean_y, sd_x, sd_y, rho0 = _moments(x[:baseline], y[:baseline])
    rho0 = np.where(count >= MIN_BASELINE_FRACTION * baseline, rho0, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        u = (x[baseline:] - mean_x) / sd_x
        v = (y[baseline:] - mean_y) / sd_y
    a = u * u + v * v  # NaN on incomplete rows (and for a pair without a baseline)
    b = u * v
    reference = np.clip(rho0, -RHO_LIMIT, RHO_LIMIT)
    null = _log_kernel(a, b, reference)
    larger = np.zeros(reference.shape)
    start = np.full(reference.shape, horizon, dtype=np.int64)
    for step in (change * factor for factor in ALTERNATIVES):
        for rho1 in (reference + step, reference - step):
            rho1 = np.clip(rho1, -RHO_LIMIT, RHO_LIMIT)
            value, where = _one_sided(a, null, reference, rho1, b)
            better = value > larger
            larger = np.where(better, value, larger)
            start = np.where(better, where, start)
    present = np.isfinite(a)
    known = np.isfinite(rho0) & present.any(axis=0)
    larger = np.where(known, larger, np.nan)
    since = np.arange(horizon)[:, None] >= start[None, :]
    _, _, _, _, _, recent = _moments(np.where(since, u, np.nan), np.where(since, v, np.nan))
    return Evidence(evidence=larger, reference=rho0, since_change=recent, start=start)


PAIR_BLOCK = 8192
"""Pairs evaluated together: (rows, 8192) float arrays are 25 MB at 378 rows, so memory
stays bounded however many pairs a rule watches."""


def pair_evidence(history: FloatArray, pairs: IntArray, *, baseline: int, horizon: int,
                  change: float) -> Evidence:
    """:func:`evidence` for pairs (P, 2) of the columns of ``history`` (L, N)."""
    recent = np.asarray(history, dtype=np.float64)[-(baseline + horizon):]
    return pair_evidence_of(np.take(recent, pairs[:, 0], axis=1),
                            np.take(recent, pairs[:, 1], axis=1),
                            baseline=baseline, horizon=horizon, change=change)


def pair_evidence_of(x: FloatArray, y: FloatArray, *, baseline: int, horizon: int,
                     change: float) -> Evidence:
    """:func:`evidence` for the columns of ``x`` and ``y`` (L, P), in blocks of
    :data:`PAIR_BLOCK` pairs (a loop over blocks, never over pairs)."""
    rows = baseline + horizon
    x = np.asarray(x, dtype=np.float64)[-rows:]
    y = np.asarray(y, dtype=np.float64)[-rows:]
    width = x.shape[1]
    parts = [
        evidence(np.ascontiguousarray(x[:, k:k + PAIR_BLOCK]),
                 np.ascontiguousarray(y[:, k:k + PAIR_BLOCK]),
                 baseline=baseline, horizon=horizon, change=change)
        for k in range(0, max(width, 1), PAIR_BLOCK)
    ]
    if len(parts) == 1:
        return parts[0]
    return Evidence(*(np.concatenate([getattr(part, name) for part in parts])
                      for name in ("evidence", "reference", "since_change", "start")))


# --- simulation and calibration ---------------------------------------------------------


def heavy_tailed_pairs(rng: np.random.Generator, days: int, rhos: Float1D, *,
                       df: float = CALIBRATION_DF, cap: float = CALIBRATION_CAP
                       ) -> tuple[FloatArray, FloatArray]:
    """Seeded bivariate Student t pairs with unit variance, capped at +-``cap``.

    Parameters
    ----------
    rng : numpy Generator
    days : int
        Rows T.
    rhos : float array (P,)
        Correlation of each pair (of the t shocks before capping).
    df : float
        Degrees of freedom (> 2).

    Returns
    -------
    x, y : float arrays (T, P)
        No NaN.
    """
    rhos = np.asarray(rhos, dtype=np.float64)
    size = (days, rhos.shape[0])
    z1 = rng.standard_normal(size)
    z2 = rho_mix(rhos, z1, rng.standard_normal(size))
    # A common chi-square mixing variable makes the pair bivariate t (not two
    # independent t's); the factor (df - 2) / df gives unit variance.
    scale = np.sqrt((df - 2.0) / rng.chisquare(df, size))
    return np.clip(z1 * scale, -cap, cap), np.clip(z2 * scale, -cap, cap)


def rho_mix(rhos: Float1D, first: FloatArray, second: FloatArray) -> FloatArray:
    """``rho * first + sqrt(1 - rho^2) * second``: a normal correlated ``rho`` with ``first``."""
    return rhos * first + np.sqrt(1.0 - rhos * rhos) * second


def evidence_series(x: FloatArray, y: FloatArray, *, baseline: int, horizon: int,
                    change: float, block: int = 64) -> FloatArray:
    """The statistic of every day from row ``baseline + horizon - 1`` on, for columns (T, P).

    The same :func:`evidence` the rule runs, applied to a block of days at a time (each
    day's window becomes a column), which keeps the Python loop short.

    Returns
    -------
    float array (T - baseline - horizon + 1, P)
    """
    rows = baseline + horizon
    days, pairs = x.shape
    windows_x = np.lib.stride_tricks.sliding_window_view(x, rows, axis=0)  # (D, P, rows)
    windows_y = np.lib.stride_tricks.sliding_window_view(y, rows, axis=0)
    out = np.empty((days - rows + 1, pairs))
    for first in range(0, out.shape[0], block):
        last = min(out.shape[0], first + block)
        # (days, P, rows) -> (rows, days * P): every (day, pair) window is one column.
        wx = windows_x[first:last].reshape(-1, rows).T
        wy = windows_y[first:last].reshape(-1, rows).T
        day = evidence(wx, wy, baseline=baseline, horizon=horizon, change=change)
        out[first:last] = day.evidence.reshape(last - first, pairs)
    return out


def openings(series: FloatArray, boundary: float, clear_fraction: float = CLEAR_FRACTION
             ) -> int:
    """Alerts opened by the rule's open/clear logic (``hold`` = 1) on a series (D, P).

    Opens where the evidence goes above ``boundary`` with no alert open, clears where it
    falls below ``clear_fraction * boundary``; NaN days change nothing.
    """
    above = series > boundary
    below = series < clear_fraction * boundary
    is_open = np.zeros(series.shape[1], dtype=bool)
    total = 0
    for k in range(series.shape[0]):
        new = above[k] & ~is_open
        total += int(new.sum())
        is_open = (is_open | new) & ~below[k]
    return total


@dataclass(frozen=True)
class Calibration:
    """How a boundary was found.

    Attributes
    ----------
    boundary : float
        ``h`` for the stated rate.
    slope, intercept : float
        The fit ``log(openings per pair-year) = intercept + slope * h``.
    grid, rates : tuple of float
        Boundaries tried and their simulated openings per pair-year.
    pair_years : float
        Simulated pair-years behind each rate.
    """

    boundary: float
    slope: float
    intercept: float
    grid: tuple[float, ...]
    rates: tuple[float, ...]
    pair_years: float


def clustered_pairs(rng: np.random.Generator, days: int, rhos: Float1D
                    ) -> tuple[FloatArray, FloatArray]:
    """Seeded returns of pairs with volatility clustering and fat tails, standardised by
    the production :func:`~monitor.engine.scaling.standardise`.

    Each pair: bivariate Student t shocks (:data:`CALIBRATION_DF`, unit variance, not
    capped) times a GARCH(1,1) volatility common to the pair (Bollerslev 1986, Journal of
    Econometrics 31, from memory) with alpha = :data:`GARCH_ALPHA`, beta = :data:`GARCH_BETA`.

    Returns
    -------
    x, y : float arrays (days - WARM_UP_ROWS, P)
        The standardised values after the volatility warm-up (no NaN).
    """
    rhos = np.asarray(rhos, dtype=np.float64)
    first, second = heavy_tailed_pairs(rng, days, rhos, cap=math.inf)
    variance = np.empty(first.shape)
    level = np.ones(first.shape[1])
    for t in range(days):
        variance[t] = level
        level = (1.0 - GARCH_ALPHA - GARCH_BETA) + (
            GARCH_ALPHA * first[t] ** 2 + GARCH_BETA) * level
    scale = np.sqrt(variance)
    scaled = standardise(np.hstack([first * scale, second * scale]))[WARM_UP_ROWS:]
    pairs = first.shape[1]
    return scaled[:, :pairs], scaled[:, pairs:]


def simulate_null(seed: int, pairs: int, days: int, *, baseline: int, horizon: int,
                  change: float) -> FloatArray:
    """Evidence series (days, pairs) on constant-correlation pairs (:func:`clustered_pairs`).

    The pairs' correlations cycle through :data:`CALIBRATION_RHOS`; warm-up rows are
    simulated in front so every returned day has a full window.
    """
    rng = np.random.default_rng(seed)
    rhos = np.resize(np.asarray(CALIBRATION_RHOS), pairs)
    x, y = clustered_pairs(rng, days + baseline + horizon - 1 + WARM_UP_ROWS, rhos)
    return evidence_series(x, y, baseline=baseline, horizon=horizon, change=change)


@functools.lru_cache(maxsize=32)
def calibrate(false_alarms: float, baseline: int, horizon: int, change: float) -> Calibration:
    """The boundary giving ``false_alarms`` openings per pair per year (see the module
    docstring); deterministic, cached per setting. Takes a few seconds the first time."""
    series = simulate_null(CALIBRATION_SEED, CALIBRATION_PAIRS, CALIBRATION_DAYS,
                           baseline=baseline, horizon=horizon, change=change)
    pair_years = series.size / BUSINESS_DAYS_PER_YEAR
    # The grid starts where openings are frequent and climbs until they become too few.
    grid: list[float] = []
    rates: list[float] = []
    h = float(np.quantile(series, 0.9))
    while True:
        count = openings(series, h)
        if count < MIN_FIT_OPENINGS:
            break
        grid.append(h)
        rates.append(count / pair_years)
        h += 0.5
    if len(grid) < 3:
        raise RuntimeError("cusum calibration found too few openings to fit (internal error)")
    # The lowest grid points sit where the exponential regime has not started yet
    # (openings are limited by the clearing, not by the boundary); fit the upper half.
    upper = max(3, len(grid) // 2)
    hs = np.asarray(grid[-upper:])
    logs = np.log(np.asarray(rates[-upper:]))
    slope, intercept = np.polyfit(hs, logs, 1)
    boundary = (math.log(false_alarms) - intercept) / slope
    return Calibration(boundary=float(boundary), slope=float(slope),
                       intercept=float(intercept), grid=tuple(grid), rates=tuple(rates),
                       pair_years=float(pair_years))


KNOWN_BOUNDARIES: dict[tuple[float, int, int, float], float] = {
    (0.01, 252, 126, 0.35): 12.936320179512283,
}
""":func:`calibrate` results for the default settings, so a desk on the defaults does not
wait for the simulation; tests/rules/test_cusum.py recomputes every entry and requires equality."""


def boundary(false_alarms: float, baseline: int, horizon: int, change: float) -> float:
    """``h`` for ``false_alarms`` expected openings per pair per year (cached)."""
    key = (float(false_alarms), int(baseline), int(horizon), float(change))
    if key in KNOWN_BOUNDARIES:
        return KNOWN_BOUNDARIES[key]
    return calibrate(*key).boundary


# --- Lorden's floor -----------------------------------------------------------------------


def kullback_leibler(rho1: float, rho0: float) -> float:
    """KL information per day of a standard bivariate normal with correlation ``rho1``
    against one with ``rho0`` (unit variances): ``(1 - rho0 rho1) / (1 - rho0^2) - 1
    + 0.5 log((1 - rho0^2) / (1 - rho1^2))``."""
    q0 = 1.0 - rho0 * rho0
    q1 = 1.0 - rho1 * rho1
    return (1.0 - rho0 * rho1) / q0 - 1.0 + 0.5 * math.log(q0 / q1)


def lorden_floor(rho0: float, rho1: float, false_alarms: float) -> float:
    """Lorden's lower bound on the worst-case detection delay, in business days, for a
    change ``rho0 -> rho1`` at ``false_alarms`` false alerts per pair per year
    (ARL0 = 252 / false_alarms business days)."""
    arl0 = BUSINESS_DAYS_PER_YEAR / false_alarms
    return math.log(arl0) / kullback_leibler(rho1, rho0)
