"""Group average: the average off-diagonal correlation of a group, NaN pairs left out."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.engine import group_average, group_average_series, group_pairs, matrix_on_pair_dates
from monitor.errors import EngineInputError
from tests.engine_reference import desk_returns


def test_gauge_averages_the_defined_pairs_of_the_group() -> None:
    matrix = np.array(
        [
            [1.0, 0.5, np.nan, 0.1],
            [0.5, 1.0, 0.3, 0.9],
            [np.nan, 0.3, 1.0, -0.2],
            [0.1, 0.9, -0.2, 1.0],
        ]
    )
    day = group_average(matrix, [0, 1, 2])
    assert (day.value, day.pairs_used) == (pytest.approx(0.4), 2)
    day = group_average(matrix, [3, 1, 1, 0])
    assert (day.value, day.pairs_used) == (pytest.approx(0.5), 3)
    empty = group_average(matrix, [0, 2])
    assert np.isnan(empty.value) and empty.pairs_used == 0


def test_series_from_the_pairs_equals_the_gauge_of_the_matrix() -> None:
    returns = desk_returns()
    members = [0, 1, 4, 6]
    series = list(group_average_series(returns, "rolling:30", members, start=90, stop=200))
    matrices = list(matrix_on_pair_dates(returns, "rolling:30", start=90, stop=200))
    for gauge, day in zip(series, matrices, strict=True):
        expected = group_average(day.value, members)
        assert gauge.t == day.t
        assert gauge.pairs_used == expected.pairs_used
        assert gauge.value == pytest.approx(expected.value, abs=1e-12, nan_ok=True)
    # VOSK's stale close takes its pairs out while the window is flat
    assert series[60].pairs_used < series[0].pairs_used


def test_pairs_of_a_group_are_each_unordered_pair_once() -> None:
    assert group_pairs([5, 2, 9]).tolist() == [[2, 5], [2, 9], [5, 9]]


def test_a_group_needs_two_members() -> None:
    with pytest.raises(EngineInputError, match="at least 2"):
        group_pairs([3, 3])
