"""An honest variance for a sample correlation on fat-tailed returns.

Fisher's ``1 / (n - 3)`` for ``atanh r`` assumes independent normal returns. For independent
(or martingale-difference) returns with finite fourth moments the delta method gives the
asymptotic variance of the sample Pearson ``r`` in terms of the fourth moments of the two
standardised variables ``x``, ``y`` (mean 0, variance 1, correlation ``rho``)::

    Var(r) ~ (1/n) E[(x y - (rho/2)(x^2 + y^2))^2]
           = (1/n) [ (rho^2/4)(m40 + m04 + 2 m22) - rho (m31 + m13) + m22 ]

with ``m_ab = E[x^a y^b]`` (Steiger & Hakstian 1982, British Journal of Mathematical and
Statistical Psychology 35, 208-215, from memory; the delta-method result is classical). For
normal data it is ``(1 - rho^2)^2 / n``, Fisher's variance of ``r``.

The rules need a cheap version for every pair every day: the *tail factor*
``phi = Var(r) / ((1 - rho^2)^2 / n)``, which multiplies Fisher's variance of ``atanh r``.
For elliptical distributions ``phi = 1 + kappa`` with ``kappa = k / 3 - 1`` and ``k`` the
common kurtosis of the margins (Muirhead 1982, Aspects of Multivariate Statistical Theory,
from memory). Per pair it is approximated from the two instruments' own kurtoses,
``kappa = (k_i + k_j) / 6 - 1``, so a day costs O(L N) for the kurtoses plus a gather per
pair, never a loop over pairs. ``phi`` is floored at 1: thin tails never narrow the test.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from monitor._typing import Float1D

KURTOSIS_ROWS = 252
"""Trailing rows of standardised returns behind each instrument's kurtosis (one year)."""
MIN_KURTOSIS_ROWS = 60
"""Fewer present returns than this in the trailing rows give a NaN kurtosis."""


def adf_variance_from_moments(
    rho: npt.ArrayLike,
    m40: npt.ArrayLike,
    m04: npt.ArrayLike,
    m22: npt.ArrayLike,
    m31: npt.ArrayLike,
    m13: npt.ArrayLike,
    n: npt.ArrayLike,
) -> Float1D:
    """Asymptotic variance of the sample Pearson r from fourth moments (arrays broadcast).

    Parameters
    ----------
    rho : float array
        Correlation of the two variables.
    m40, m04, m22, m31, m13 : float arrays
        Moments ``E[x^a y^b]`` of the standardised variables.
    n : float array
        Observations in the window.

    Returns
    -------
    float array
        ``(1/n)[(rho^2/4)(m40 + m04 + 2 m22) - rho (m31 + m13) + m22]``; NaN in, NaN out.
    """
    r = np.asarray(rho, dtype=np.float64)
    inner = (
        (r * r / 4.0) * (np.asarray(m40) + np.asarray(m04) + 2.0 * np.asarray(m22))
        - r * (np.asarray(m31) + np.asarray(m13))
        + np.asarray(m22)
    )
    return np.asarray(inner / np.asarray(n, dtype=np.float64), dtype=np.float64)


def adf_variance_r(x: npt.ArrayLike, y: npt.ArrayLike) -> Float1D:
    """Delta-method variance of Pearson r estimated from the windows themselves.

    Parameters
    ----------
    x, y : float arrays (..., n)
        Paired observations; the last axis is the window. Each window is standardised by
        its own sample mean and standard deviation, and ``rho`` is its sample r.

    Returns
    -------
    float array (...)
        The estimated ``Var(r)``. A window with a NaN, or a side that does not move, gives
        NaN (pairwise-complete windows are the caller's job).
    """
    a = np.asarray(x, dtype=np.float64)
    b = np.asarray(y, dtype=np.float64)
    n = a.shape[-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        a = a - a.mean(axis=-1, keepdims=True)
        b = b - b.mean(axis=-1, keepdims=True)
        a = a / np.sqrt((a * a).mean(axis=-1, keepdims=True))
        b = b / np.sqrt((b * b).mean(axis=-1, keepdims=True))
        rho = (a * b).mean(axis=-1)
        a2, b2 = a * a, b * b
        return adf_variance_from_moments(
            rho,
            (a2 * a2).mean(axis=-1),
            (b2 * b2).mean(axis=-1),
            (a2 * b2).mean(axis=-1),
            (a2 * a * b).mean(axis=-1),
            (b2 * b * a).mean(axis=-1),
            float(n),
        )


def instrument_kurtosis(
    history: npt.ArrayLike, *, rows: int = KURTOSIS_ROWS, min_rows: int = MIN_KURTOSIS_ROWS
) -> Float1D:
    """Kurtosis ``m4 / m2^2`` of each instrument over the trailing ``rows`` rows.

    Parameters
    ----------
    history : float array (L, N)
        Standardised returns, last row = today; NaN = missing (rows before the history).
    rows : int
        Trailing rows used (all of them when ``L < rows``).
    min_rows : int
        Fewer present values than this give NaN.

    Returns
    -------
    float array (N,)
        3 for normal data (in expectation, up to O(1/n)); NaN where too few values or no
        variation.
    """
    values = np.asarray(history, dtype=np.float64)[-rows:]
    present = ~np.isnan(values)
    count = present.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        filled = np.where(present, values, 0.0)
        mean = filled.sum(axis=0) / count
        centred = np.where(present, values - mean, 0.0)
        squares = centred * centred
        m2 = squares.sum(axis=0) / count
        m4 = (squares * squares).sum(axis=0) / count
        kurtosis = m4 / (m2 * m2)
    kurtosis[(count < min_rows) | ~(m2 > 0.0)] = np.nan
    return np.asarray(kurtosis, dtype=np.float64)


def tail_factor(kurtosis: npt.ArrayLike, pairs: npt.ArrayLike) -> Float1D:
    """Per-pair tail factor ``phi = max(1, (k_i + k_j) / 6)`` (elliptical approximation).

    Parameters
    ----------
    kurtosis : float array (N,)
        Each instrument's kurtosis (:func:`instrument_kurtosis`).
    pairs : int array (P, 2)
        Instrument columns of each pair.

    Returns
    -------
    float array (P,)
        ``phi >= 1``; NaN where either kurtosis is NaN.
    """
    k = np.asarray(kurtosis, dtype=np.float64)
    index = np.asarray(pairs, dtype=np.intp).reshape(-1, 2)
    phi = (k[index[:, 0]] + k[index[:, 1]]) / 6.0
    return np.fmax(phi, 1.0, where=~np.isnan(phi), out=np.full(phi.shape, np.nan))


def pair_tail_factor(history: npt.ArrayLike, pairs: npt.ArrayLike) -> Float1D:
    """:func:`tail_factor` of ``pairs`` (P, 2) from standardised returns (L, N)."""
    return tail_factor(instrument_kurtosis(history), pairs)


def window_tail_factor(history: npt.ArrayLike, pairs: npt.ArrayLike, *, rows: int,
                       skip: int = 0) -> Float1D:
    """The tail factor of one test window: ``max(1, (k_i + k_j) / 6)`` with each kurtosis
    taken over the ``rows`` rows that end ``skip`` rows before today.

    Given the day-by-day scales of standardised returns, the variance of r in a window is
    about ``(1 - rho^2)^2 / n`` times ``n sum s^4 / (sum s^2)^2`` (a Kish-type effective
    count of the window, Kish 1965), which the window's own kurtosis over 3 estimates. A
    window holding one stress day is then read with the wider variance it has, where the
    long-run factor would treat it as an average window. NaN where the window has fewer
    than half its rows present.
    """
    values = np.asarray(history, dtype=np.float64)
    end = values.shape[0] - skip
    window = values[max(0, end - rows):end]
    kurtosis = instrument_kurtosis(window, rows=rows, min_rows=max(4, rows // 2))
    return tail_factor(kurtosis, pairs)
