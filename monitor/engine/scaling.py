"""Returns standardised by their own recent volatility, for the statistical rules.

Daily returns have fat tails and volatility clustering. Dividing each return by its
instrument's EWMA volatility of the days *before* it (the RiskMetrics recursion,
J.P. Morgan/Reuters, RiskMetrics Technical Document, 4th ed. 1996, decay 0.94) removes
most of the clustering; capping the result at +-``cap`` keeps a single extreme day from
dominating a window. This is the first step of two-step correlation models (common
practice); the statistical rules (``shift``, ``cusum``, ``sign``) correlate these values,
while the level rules and the digest's numbers keep the plain returns.

The volatility is an exact function of the trailing ``lookback`` rows (weights
``lam**k`` over the present days among rows t-1 .. t-lookback, renormalised), so a value
never depends on where a computation started: a resumed backfill and the daily run see the
same numbers as a full pass.
"""

from __future__ import annotations

import numpy as np

from monitor._typing import Returns2D
from monitor.errors import EngineInputError

DEFAULT_DECAY = 0.94
"""RiskMetrics daily decay (RiskMetrics Technical Document 1996)."""
DEFAULT_LOOKBACK = 250
"""Rows of history behind each volatility (0.94**250 is about 2e-7 of the weight)."""
DEFAULT_CAP = 4.0
"""Standardised returns are clipped to +-4 (about 1 in 16,000 normal days)."""
MIN_PRESENT = 20
"""Fewer present returns than this in the lookback give NaN (no volatility yet)."""


def standardise(
    returns: Returns2D,
    *,
    lam: float = DEFAULT_DECAY,
    lookback: int = DEFAULT_LOOKBACK,
    cap: float = DEFAULT_CAP,
) -> Returns2D:
    """Each return divided by its own lagged EWMA volatility, capped at +-``cap``.

    Parameters
    ----------
    returns : float array (T, N)
        NaN where an instrument has no return.
    lam : float
        Daily decay, ``0 < lam < 1``.
    lookback : int
        Rows t-1 .. t-lookback feed the volatility of row t.
    cap : float
        Clip level of the standardised values (> 0).

    Returns
    -------
    float array (T, N)
        NaN where the return is NaN, where fewer than ``MIN_PRESENT`` returns precede it in
        the lookback, or where the volatility is zero.

    Raises
    ------
    EngineInputError
        A parameter outside its range.
    """
    if not 0.0 < lam < 1.0:
        raise EngineInputError(f"volatility decay must be between 0 and 1, got {lam!r}")
    if lookback < MIN_PRESENT:
        raise EngineInputError(
            f"volatility lookback must be at least {MIN_PRESENT}, got {lookback!r}")
    if not cap > 0.0:
        raise EngineInputError(f"standardised cap must be positive, got {cap!r}")
    values = np.asarray(returns, dtype=np.float64)
    if values.ndim != 2:
        raise EngineInputError(f"returns must be a (T, N) array, got shape {values.shape}")
    rows, _ = values.shape
    present = ~np.isnan(values)
    squares = np.where(present, values * values, 0.0)
    # Weighted trailing sums by cumulative sums of rescaled rows: sum_{k} lam^k x_{t-1-k}
    # = lam^(t-1) * (C_{t-1} - C_{t-1-lookback}) with C_s = sum_{u<=s} lam^(-u) x_u. The
    # rescaling overflows on long histories, so it runs in blocks of rows re-based at each
    # block start (a block shorter than 600 rows keeps lam^-600 below 1e17).
    numerator = np.full(values.shape, np.nan)
    denominator = np.full(values.shape, np.nan)
    count = np.zeros(values.shape)
    counts_cum = np.vstack([np.zeros((1, values.shape[1])), np.cumsum(present, axis=0)])
    block = 512
    for start in range(1, rows, block):
        stop = min(rows, start + block)
        lo = max(0, start - lookback - 1)
        seg_sq = squares[lo:stop]
        seg_w = present[lo:stop].astype(np.float64)
        local = np.arange(stop - lo, dtype=np.float64)
        scale = lam ** (-local)[:, None]
        c_sq = np.vstack([np.zeros((1, seg_sq.shape[1])), np.cumsum(seg_sq * scale, axis=0)])
        c_w = np.vstack([np.zeros((1, seg_w.shape[1])), np.cumsum(seg_w * scale, axis=0)])
        for t in range(start, stop):
            end = t - lo  # rows lo .. t-1 are local 0 .. end-1
            begin = max(0, end - lookback)
            factor = lam ** (end - 1)
            numerator[t] = (c_sq[end] - c_sq[begin]) * factor
            denominator[t] = (c_w[end] - c_w[begin]) * factor
        count[start:stop] = (counts_cum[start:stop] -
                             counts_cum[np.maximum(0, np.arange(start, stop) - lookback)])
    with np.errstate(invalid="ignore", divide="ignore"):
        variance = numerator / denominator
        scaled = values / np.sqrt(variance)
    scaled[(count < MIN_PRESENT) | ~(variance > 0.0) | ~present] = np.nan
    return np.clip(scaled, -cap, cap)
