"""Closes to returns, without inventing anything: a missing close never becomes a zero return.

Pure: a closes panel (DatetimeIndex x symbols, NaN where there is no close) in, a returns
panel of the same layout out. Each instrument's return runs from its own previous close,
across days its market was shut (up to ``max_gap`` business days), so a return never
depends on which other instruments the panel holds; a pair then uses the dates on which
both have a return (:mod:`monitor.engine.pairdates`). Correlations are computed on returns,
never on price levels (common practice; two independent random walks often show a large |r|
in levels: Yule 1926, Granger & Newbold 1974).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from monitor._typing import ReturnKind
from monitor.data.parse import MAX_CLOSE, MIN_CLOSE
from monitor.errors import ConfigError

DEFAULT_MAX_GAP = 5
"""Business days a return may span by default (a week of closures, e.g. a long holiday)."""


def closes_to_returns(
    closes: pd.DataFrame,
    *,
    kind: ReturnKind = "log",
    horizon: int = 1,
    fill_limit: int = 0,
    max_gap: int = DEFAULT_MAX_GAP,
) -> pd.DataFrame:
    """Returns from a closes panel: each instrument from its own previous close.

    Parameters
    ----------
    closes : DataFrame (T, N), index of dates ascending, NaN = no close that day.
    kind : "log" gives log(c_t / c_prev); "simple" gives c_t / c_prev - 1.
    horizon : h >= 1. Above 1 the panel is sampled every h rows counted back from the last
        row, giving non-overlapping h-day returns dated at the end of each span.
    fill_limit : k >= 0. A missing close is carried forward from the last close for at
        most k consecutive rows before returns are taken (a carried close gives a zero
        return); 0 carries nothing.
    max_gap : g >= 1. A return runs from the instrument's own previous close, however many
        rows of the panel (days other instruments traded) lie between, as long as the two
        closes are at most ``g * h`` business days (Monday to Friday) apart; further apart
        the return is missing. So a row's return does not depend on which other
        instruments share the panel.

    Returns
    -------
    DataFrame with one row per sampled date after the first (T - 1 rows for h = 1) and
    the same columns; NaN on a date without a close, at an instrument's first close, and
    after a gap longer than ``max_gap``. A missing close is never a zero return.
    """
    if kind not in ("log", "simple"):
        raise ConfigError(f"returns.kind: {kind!r} is not one of log, simple")
    if horizon < 1:
        raise ConfigError(f"returns.horizon: {horizon!r} is not an integer >= 1")
    if fill_limit < 0:
        raise ConfigError(f"returns.fill_limit: {fill_limit!r} is not an integer >= 0")
    if isinstance(max_gap, bool) or max_gap < 1:
        raise ConfigError(f"returns.max_gap: {max_gap!r} is not an integer >= 1")
    panel = closes.sort_index().astype("float64")
    if fill_limit > 0:
        panel = panel.ffill(limit=fill_limit)
    if horizon > 1:
        keep = np.arange(len(panel) - 1, -1, -horizon)[::-1]
        panel = panel.iloc[keep]
    values = panel.to_numpy()
    # Only closes ingest accepts enter a return: a store written before that check may
    # still hold an extreme close (1e-320), which counts as missing. Within the range the
    # ratio of two closes is at most MAX_CLOSE / MIN_CLOSE, so every return is finite.
    values = np.where((values >= MIN_CLOSE) & (values <= MAX_CLOSE), values, np.nan)
    rows = len(panel)
    if rows == 0:
        return pd.DataFrame(np.empty((0, values.shape[1])), index=panel.index[1:],
                            columns=panel.columns)
    present = ~np.isnan(values)
    # Row of each instrument's latest close on or before each row (-1: none yet), then the
    # previous close of a row is the latest one strictly before it.
    latest = np.where(present, np.arange(rows)[:, None], -1)
    latest = np.maximum.accumulate(latest, axis=0)
    previous = np.vstack([np.full((1, values.shape[1]), -1), latest[:-1]])
    start = np.where(previous >= 0, previous, 0)
    before = np.take_along_axis(values, start, axis=0)
    days = panel.index.to_numpy(dtype="datetime64[D]")
    gap = np.busday_count(days[start], days[:, None])
    usable = present & (previous >= 0) & (gap <= max_gap * horizon)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(usable, values / np.where(usable, before, 1.0), np.nan)
        out = np.log(ratio) if kind == "log" else ratio - 1.0
    return pd.DataFrame(out[1:], index=panel.index[1:], columns=panel.columns)
