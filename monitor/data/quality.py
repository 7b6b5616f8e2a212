"""Data quality of a closes panel: suspect ticks, and how long each close has been missing
or unchanged (the inputs of the `stale` rule). Pure: frames in, frames and arrays out."""

from __future__ import annotations

import numpy as np
import pandas as pd


def find_suspects(existing: pd.DataFrame, new: pd.DataFrame, threshold: float) -> pd.DataFrame:
    """Closes whose daily |log return| against the neighbouring close exceeds `threshold`.

    `existing` and `new` have columns symbol, date, close; `new` wins where both have a
    date. Returns the suspect rows of `new` (symbol, date, close, previous_close,
    log_return); a big move is accepted, only reported, since one bad tick distorts a
    correlation for a whole window (common practice).
    """
    columns = ["symbol", "date", "close", "previous_close", "log_return"]
    if new.empty:
        return pd.DataFrame(columns=columns)
    merged = pd.concat(
        [existing[["symbol", "date", "close"]].assign(is_new=False),
         new[["symbol", "date", "close"]].assign(is_new=True)],
        ignore_index=True,
    )
    merged = merged.sort_values(["symbol", "date", "is_new"]).drop_duplicates(
        ["symbol", "date"], keep="last"
    )
    prev = merged.groupby("symbol", sort=False)["close"].shift(1)
    log_ret = np.log(merged["close"].to_numpy() / prev.to_numpy())
    big = np.abs(log_ret) > threshold
    # Report a move on the new close, or on the existing close right after a new one.
    pick = big & (merged["is_new"].to_numpy() | _after_new(merged))
    out = merged.loc[pick, ["symbol", "date", "close"]].copy()
    out["previous_close"] = prev.to_numpy()[pick]
    out["log_return"] = log_ret[pick]
    return out.reset_index(drop=True)[columns]


def _after_new(merged: pd.DataFrame) -> np.ndarray:
    prev_new = merged.groupby("symbol", sort=False)["is_new"].shift(1)
    return prev_new.fillna(False).to_numpy().astype(bool)


def stale_inputs(closes: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Per date and instrument: rows since the last close, and rows the close has not changed.

    Parameters
    ----------
    closes : DataFrame (T, N), NaN where there is no close.

    Returns
    -------
    days_without_close, days_unchanged : float arrays (T, N); NaN before an instrument's
        first close. A date is a row of the panel (a day on which some instrument closed).
    """
    values = closes.to_numpy(dtype=np.float64)
    rows = np.arange(values.shape[0], dtype=np.float64)[:, None]
    has = ~np.isnan(values)
    last_close = np.where(has, rows, np.nan)
    last_close = pd.DataFrame(last_close).ffill().to_numpy()
    filled = pd.DataFrame(values).ffill().to_numpy()
    previous = np.vstack([np.full((1, values.shape[1]), np.nan), filled[:-1]])
    changed = has & ~(filled == previous)
    last_change = pd.DataFrame(np.where(changed, rows, np.nan)).ffill().to_numpy()
    return rows - last_close, rows - last_change


def calendar_losses(returns: np.ndarray, pairs: np.ndarray, window: int
                    ) -> tuple[np.ndarray, np.ndarray]:
    """For each pair, the dates its latest window lost to calendar differences.

    A pair's window is its last ``window`` own dates (rows where both have a return, see
    :mod:`monitor.engine.pairdates`) up to the last row. A row inside the window's span on
    which only one side has a return (the other's market was shut, or it has no close)
    is not a date of the pair: the side that traded loses that day's return (the other
    side's next return spans it).

    Parameters
    ----------
    returns : float array (T, N), NaN = no return
    pairs : int array (P, 2)
    window : int >= 1

    Returns
    -------
    lost : int array (P,)
        Rows in the span of the window with a return on one side only.
    first : int array (P,)
        First row of the window's span (-1 for a pair with no own date yet).
    """
    values = np.asarray(returns, dtype=np.float64)
    index = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    present = ~np.isnan(values)
    lost = np.zeros(len(index), dtype=np.int64)
    first = np.full(len(index), -1, dtype=np.int64)
    if not len(index) or not values.shape[0]:
        return lost, first
    # Instruments with returns on exactly the same rows lose nothing to each other: their
    # pairs are worked out once per such group, the others a slice at a time, so a desk
    # of 3,000 instruments (4.5 million pairs) never holds (T, P) arrays (2 GB each).
    _, group = np.unique(np.packbits(present, axis=0).T, axis=0, return_inverse=True)
    group = np.asarray(group, dtype=np.int64).reshape(-1)
    same = group[index[:, 0]] == group[index[:, 1]]
    if same.any():
        members = np.flatnonzero(same)
        column_of = {int(g): int(c) for c, g in reversed(list(enumerate(group.tolist())))}
        columns = np.array([column_of[int(g)] for g in np.unique(group[index[members, 0]])])
        _, group_first = _window_losses(present, np.column_stack([columns, columns]), window)
        lookup = dict(zip(group[columns].tolist(), group_first.tolist(), strict=True))
        first[members] = [lookup[int(g)] for g in group[index[members, 0]].tolist()]
    others = np.flatnonzero(~same)
    for start in range(0, len(others), LOSSES_SLICE):
        part = others[start:start + LOSSES_SLICE]
        lost[part], first[part] = _window_losses(present, index[part], window)
    return lost, first


LOSSES_SLICE = 50_000
"""Pairs of different calendars worked out at a time by `calendar_losses`."""


def _window_losses(present: np.ndarray, index: np.ndarray, window: int
                   ) -> tuple[np.ndarray, np.ndarray]:
    """`calendar_losses` on the presence matrix for the given pairs, all at once."""
    left, right = present[:, index[:, 0]], present[:, index[:, 1]]
    both = left & right
    either = left ^ right
    # row where each pair's last `window` own dates begin: count own dates from the end
    from_end = np.cumsum(both[::-1], axis=0)[::-1]
    inside = from_end <= window
    has = np.asarray(both.any(axis=0), dtype=bool)
    first = np.where(has, np.argmax(inside & both, axis=0), -1)
    rows = np.arange(present.shape[0])[:, None]
    span = (rows >= first[None, :]) & has[None, :]
    lost = (either & span).sum(axis=0)
    return lost.astype(np.int64), first.astype(np.int64)
