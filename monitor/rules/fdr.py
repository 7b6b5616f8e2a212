"""False discovery rate control over one day's p-values (pure numpy).

Benjamini & Hochberg (1995, Journal of the Royal Statistical Society B 57, 289-300): with
``m`` p-values sorted ``p_(1) <= ... <= p_(m)``, reject the ``k`` smallest where ``k`` is
the largest index with ``p_(k) <= k q / m``; the expected share of false discoveries among
the rejections is at most ``q`` for independent (or positively dependent) tests.
Benjamini & Yekutieli (2001, Annals of Statistics 29, 1165-1188) divide ``q`` by
``c_m = sum_{i<=m} 1/i`` and hold under any dependence.

Both are computed as adjusted p-values ``min_{j >= i} (m c / j) p_(j)`` capped at 1 (a test is
rejected when its adjusted p-value is at most ``q``), which is the step-up rule above. NaN
p-values (pairs without a decision today) take no part: ``m`` counts the known ones.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt

from monitor._typing import Float1D

FdrMethod = Literal["bh", "by"]
FDR_METHODS: tuple[FdrMethod, ...] = ("bh", "by")


def adjusted_p(p: npt.ArrayLike, method: FdrMethod = "bh") -> Float1D:
    """Benjamini-Hochberg (``bh``) or Benjamini-Yekutieli (``by``) adjusted p-values.

    Parameters
    ----------
    p : float array (P,)
        p-values in [0, 1]; NaN for tests not made.
    method : {"bh", "by"}

    Returns
    -------
    float array (P,)
        Adjusted p-values, NaN where ``p`` is NaN; ties get equal adjusted values.
    """
    values = np.asarray(p, dtype=np.float64).ravel()
    out = np.full(values.shape, np.nan)
    known = np.flatnonzero(~np.isnan(values))
    m = known.size
    if m == 0:
        return out
    order = np.argsort(values[known], kind="stable")
    ranked = values[known][order]
    factor = float(m)
    if method == "by":
        factor *= float(np.sum(1.0 / np.arange(1, m + 1)))
    scaled = ranked * factor / np.arange(1, m + 1)
    # The running minimum from the largest p-value down makes the step-up rule.
    adjusted = np.minimum.accumulate(scaled[::-1])[::-1]
    out[known[order]] = np.minimum(adjusted, 1.0)
    return out


def rejected(p: npt.ArrayLike, q: float, method: FdrMethod = "bh") -> npt.NDArray[np.bool_]:
    """Tests (P,) rejected at false discovery rate ``q``; False where ``p`` is NaN."""
    adjusted = adjusted_p(p, method)
    with np.errstate(invalid="ignore"):
        return np.asarray(adjusted <= q, dtype=bool)
