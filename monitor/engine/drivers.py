"""Which days made a pair's correlation what it is (every measure: :func:`measure_drivers`).

Pearson's r over a window is a sum of per-day terms: with each side standardised by the
window's mean and sample standard deviation over the pair's common days,
``r = sum_d z_x(d) z_y(d) / (n - 1)``. A day with a large positive term moved both
instruments far in the same direction; a large negative term, far in opposite directions.
Sorting the terms explains an alert: these are the days that pulled the pair together (or
apart).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor.engine.layout import FloatArray, IntArray
from monitor.engine.spec import Measure, as_measure
from monitor.engine.stream import as_returns
from monitor.engine.windows import window_bounds
from monitor.errors import EngineInputError


@dataclass(frozen=True, eq=False)
class Drivers:
    """Per-day contributions to one pair's rolling correlation on one day.

    Attributes
    ----------
    days : (n,) int array
        Rows of the pair's common days in the window, ascending.
    contributions : (n,) float array
        ``z_x * z_y / (n - 1)`` per day; they sum to :attr:`value`. NaN when a side is
        constant over the window.
    value : float
        The rolling correlation (NaN with fewer than 2 common days or a constant side).
    """

    days: IntArray
    contributions: FloatArray
    value: float

    def ranked(self, *, descending: bool = True) -> tuple[IntArray, FloatArray]:
        """Days and contributions sorted by contribution (largest first by default)."""
        order = np.argsort(self.contributions, kind="stable")
        if descending:
            order = order[::-1]
        return self.days[order], self.contributions[order]


def drivers(returns: npt.ArrayLike, i: int, j: int, t: int, window: int) -> Drivers:
    """Contributions of each day in the trailing window of day ``t`` to r(i, j).

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    i, j : int
        Instrument columns.
    t : int
        Day (row); negative counts from the end.
    window : int
        Window length W >= 3; the window is rows ``t - W + 1 .. t`` (cut at row 0).

    Raises
    ------
    EngineInputError
        A window shorter than 3.
    """
    if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or window < 3:
        raise EngineInputError(f"drivers window must be a whole number >= 3, got {window!r}")
    matrix = as_returns(returns)
    rows, columns = matrix.shape
    day = t + rows if t < 0 else t
    if not 0 <= day < rows:
        raise EngineInputError(f"day {t} is outside the {rows} rows of returns")
    for name, col in (("i", i), ("j", j)):
        if not 0 <= col < columns:
            raise EngineInputError(f"instrument {name}={col} is outside 0..{columns - 1}")
    lo, hi = window_bounds(day, int(window))
    x = matrix[lo:hi, i]
    y = matrix[lo:hi, j]
    common = ~(np.isnan(x) | np.isnan(y))
    days = np.flatnonzero(common) + lo
    x, y = x[common], y[common]
    n = days.size
    if n < 2:
        return Drivers(days, np.full(n, np.nan), float("nan"))
    dx = x - x.mean()
    dy = y - y.mean()
    sx = np.sqrt(np.dot(dx, dx) / (n - 1))
    sy = np.sqrt(np.dot(dy, dy) / (n - 1))
    scale_x = np.sqrt(np.dot(x, x) / n)
    scale_y = np.sqrt(np.dot(y, y) / n)
    # a constant side: the sample deviation is rounding noise against the level
    if sx <= 1e-12 * max(scale_x, 1e-300) or sy <= 1e-12 * max(scale_y, 1e-300):
        return Drivers(days, np.full(n, np.nan), float("nan"))
    contributions = (dx / sx) * (dy / sy) / (n - 1)
    value = float(np.clip(contributions.sum(), -1.0, 1.0))
    return Drivers(days, contributions, value)


EWMA_WEIGHT_FLOOR = 1e-12
"""An EWMA's days older than the one whose weight falls below this share of today's are
left out of its drivers (their terms are below rounding of the value)."""


def measure_drivers(returns: npt.ArrayLike, i: int, j: int, t: int,
                    measure: Measure | str) -> Drivers:
    """Contributions of each of the pair's own dates to the measure's value on day ``t``.

    The pair uses the rows where both have a return (as
    :func:`monitor.engine.pairdates.stream_on_pair_dates` does), up to row ``t``:

    * ``rolling:W`` — the last W of them, Pearson terms ``z_x z_y / (n - 1)``;
    * ``rank:W`` — the same terms on the window's average ranks, which sum to Spearman's
      rho (Pearson on ranks);
    * ``ewma`` — every earlier date with weight ``w = lam^age`` (age in the pair's dates),
      terms ``w dx dy / sqrt(sum w dx^2 sum w dy^2)`` with the weighted means removed
      (none for ``mean=zero``), which sum to the EWMA correlation.

    ``scale=vol`` measures use each instrument's standardised returns
    (:func:`monitor.engine.pairdates.own_standardise`). The contributions always add up to
    :attr:`Drivers.value`, the measure's value (NaN with too few dates or a constant side).
    """
    from monitor.engine.pairdates import own_standardise
    from monitor.engine.rank import average_ranks

    spec = as_measure(measure)
    matrix = as_returns(returns)
    rows, columns = matrix.shape
    day = t + rows if t < 0 else t
    if not 0 <= day < rows:
        raise EngineInputError(f"day {t} is outside the {rows} rows of returns")
    for name, col in (("i", i), ("j", j)):
        if not 0 <= col < columns:
            raise EngineInputError(f"instrument {name}={col} is outside 0..{columns - 1}")
    pair = matrix[: day + 1][:, [i, j]]
    own = np.flatnonzero(~np.isnan(pair).any(axis=1))  # the pair's own dates
    values = own_standardise(pair)[own] if spec.scale == "vol" else pair[own]
    keep = ~np.isnan(values).any(axis=1)
    days, values = own[keep], values[keep]
    if spec.kind == "ewma":
        lam = float(spec.lam or 0.0)
        ages = np.arange(len(days))[::-1].astype(np.float64)
        weights = lam ** ages
        recent = weights >= EWMA_WEIGHT_FLOOR
        days, values, weights = days[recent], values[recent], weights[recent]
    else:
        window = int(spec.window or len(days))
        days, values = days[-window:], values[-window:]
        weights = np.ones(len(days))
        if spec.kind == "rank":
            values = np.column_stack([average_ranks(values[:, 0]), average_ranks(values[:, 1])])
    n = days.size
    if n < 2:
        return Drivers(days, np.full(n, np.nan), float("nan"))
    x, y = values[:, 0], values[:, 1]
    total = weights.sum()
    if spec.kind == "ewma" and not spec.centred:
        dx, dy = x, y
    else:
        dx, dy = x - weights @ x / total, y - weights @ y / total
    var_x, var_y = float(weights @ (dx * dx)), float(weights @ (dy * dy))
    # a constant side (all its values in the window equal) has no correlation
    if np.all(x == x[0]) or np.all(y == y[0]) or var_x <= 0.0 or var_y <= 0.0:
        return Drivers(days, np.full(n, np.nan), float("nan"))
    contributions = weights * dx * dy / np.sqrt(var_x * var_y)
    value = float(np.clip(contributions.sum(), -1.0, 1.0))
    return Drivers(days, contributions, value)
