"""Group average: how tightly a group of instruments moves together on each day.

The group average is the average off-diagonal correlation of the group, over the pairs whose value
is defined that day (NaN pairs are left out), reported with the number of pairs used.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor.engine.layout import FloatArray, IntArray
from monitor.engine.pairdates import stream_on_pair_dates
from monitor.engine.spec import Measure
from monitor.errors import EngineInputError


@dataclass(frozen=True)
class GroupAverageDay:
    """The group average on one day: ``value`` (NaN when no pair is defined) and ``pairs_used``."""

    t: int
    value: float
    pairs_used: int


def group_members(members: npt.ArrayLike) -> IntArray:
    """Distinct member columns, sorted; raises EngineInputError for fewer than two."""
    index = np.asarray(members)
    if index.ndim != 1 or (index.size and not np.issubdtype(index.dtype, np.integer)):
        raise EngineInputError(
            f"group members must be a list of instrument indices, got {members!r}")
    unique = np.unique(index.astype(np.intp))
    if unique.size < 2:
        raise EngineInputError(f"a group needs at least 2 distinct members, got {unique.tolist()}")
    return unique


def group_pairs(members: npt.ArrayLike) -> IntArray:
    """Every pair ``i < j`` of the members, as a (P, 2) int array (P = m (m - 1) / 2)."""
    index = group_members(members)
    upper_i, upper_j = np.triu_indices(index.size, k=1)
    return np.stack([index[upper_i], index[upper_j]], axis=1)


def _average(values: FloatArray) -> tuple[float, int]:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return float("nan"), 0
    return float(finite.mean()), int(finite.size)


def group_average(matrix: npt.ArrayLike, members: npt.ArrayLike, t: int = -1) -> GroupAverageDay:
    """The group average from one day's (N, N) correlation matrix.

    Parameters
    ----------
    matrix : (N, N) float array
    members : int indices into the matrix (at least 2 distinct)
    t : int
        Day to record in the result.
    """
    values = np.asarray(matrix, dtype=np.float64)
    pairs = group_pairs(members)
    if values.ndim != 2 or values.shape[0] != values.shape[1]:
        raise EngineInputError(f"group_average needs an (N, N) matrix, got {values.shape}")
    if pairs.max() >= values.shape[0]:
        raise EngineInputError(
            f"group member {int(pairs.max())} is outside 0..{values.shape[0] - 1}")
    value, used = _average(values[pairs[:, 0], pairs[:, 1]])
    return GroupAverageDay(t, value, used)


def group_average_series(
    returns: npt.ArrayLike,
    measure: Measure | str,
    members: npt.ArrayLike,
    *,
    start: int = 0,
    stop: int | None = None,
) -> Iterator[GroupAverageDay]:
    """The group average for rows ``start .. stop-1``, computing only the members' pairs."""
    pairs = group_pairs(members)
    for day in stream_on_pair_dates(returns, measure, pairs, start=start, stop=stop):
        value, used = _average(day.value)
        yield GroupAverageDay(day.t, value, used)
