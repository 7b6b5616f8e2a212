"""Closes to returns, without inventing anything: a missing close never becomes a zero return.

Pure: a closes panel (DatetimeIndex x symbols, NaN where there is no close) in, a returns
panel of the same layout out. Correlations are computed on returns, never on price levels
(common practice; two independent random walks often show a large |r| in levels: Yule 1926,
Granger & Newbold 1974).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor._typing import ReturnKind
from monitor.errors import ConfigError


def closes_to_returns(
    closes: pd.DataFrame,
    *,
    kind: ReturnKind = "log",
    horizon: int = 1,
    fill_limit: int = 0,
) -> pd.DataFrame:
    """Returns from a closes panel.

    Parameters
    ----------
    closes : DataFrame (T, N), index of dates ascending, NaN = no close that day.
    kind : "log" gives log(c_t / c_{t-h}); "simple" gives c_t / c_{t-h} - 1.
    horizon : h >= 1. Above 1 the panel is sampled every h rows counted back from the last
        row, giving non-overlapping h-day returns dated at the end of each span.
    fill_limit : k >= 0. A missing close is carried forward from the last close for at
        most k consecutive rows; a longer gap stays missing.

    Returns
    -------
    DataFrame with one row per sampled date after the first (T - 1 rows for h = 1) and
    the same columns; NaN where either end of the span has no close, so a missing close
    leaves the return on that date and on the next date missing.
    """
    if kind not in ("log", "simple"):
        raise ConfigError(f"returns.kind: {kind!r} is not one of log, simple")
    if horizon < 1:
        raise ConfigError(f"returns.horizon: {horizon!r} is not an integer >= 1")
    if fill_limit < 0:
        raise ConfigError(f"returns.fill_limit: {fill_limit!r} is not an integer >= 0")
    panel = closes.sort_index().astype("float64")
    if fill_limit > 0:
        panel = panel.ffill(limit=fill_limit)
    if horizon > 1:
        keep = np.arange(len(panel) - 1, -1, -horizon)[::-1]
        panel = panel.iloc[keep]
    values = panel.to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = values[1:] / values[:-1]
        out = np.log(ratio) if kind == "log" else ratio - 1.0
    return pd.DataFrame(out, index=panel.index[1:], columns=panel.columns)
