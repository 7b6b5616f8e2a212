"""The correlation engine: pure numpy, no storage, no clock, no disk.

Input: a returns matrix (T, N), NaN = missing. Output, per day and per pair: a
correlation (rolling Pearson, EWMA, rolling Spearman), its count or Kish effective count, a
Fisher band and a stale flag; plus shift tests, day drivers, group averages and words.

Modules, one concept each: ``spec`` (measure syntax), ``layout`` (tiles and pair lists),
``windows`` (window bounds and row stacks), ``kernels`` (sums and moments inside windows),
``rolling`` (trailing-window measures), ``ewma``, ``rank``, ``bands``, ``shift``,
``drivers``, ``group_average``, ``strength``, ``stream`` (entry points), ``pairdates`` (every pair
on its own dates: the entry point the rules, ``series``, the digest and the pages use).
"""

from __future__ import annotations

from monitor.engine.bands import DEFAULT_LEVEL, fisher_band, normal_quantile
from monitor.engine.drivers import Drivers, drivers
from monitor.engine.ewma import hull_update, kish_effective_count
from monitor.engine.group_average import (
    GroupAverageDay,
    group_average,
    group_average_series,
    group_pairs,
)
from monitor.engine.pairdates import matrix_on_pair_dates, own_standardise, stream_on_pair_dates
from monitor.engine.rank import average_ranks
from monitor.engine.shift import (
    ShiftResult,
    adjacent_shift,
    independent_z,
    nested_shift,
    nested_z,
    two_sided_p,
)
from monitor.engine.spec import Measure, max_effective_count, parse_measure, window_problem
from monitor.engine.stream import DayResult, one_day, stream, tile
from monitor.engine.strength import (
    DEFAULT_LADDER,
    StrengthLadder,
    describe,
    direction,
    strength,
)

__all__ = [
    "DEFAULT_LADDER",
    "DEFAULT_LEVEL",
    "GroupAverageDay",
    "DayResult",
    "Drivers",
    "Measure",
    "ShiftResult",
    "StrengthLadder",
    "adjacent_shift",
    "average_ranks",
    "group_average",
    "group_pairs",
    "group_average_series",
    "describe",
    "direction",
    "drivers",
    "fisher_band",
    "hull_update",
    "independent_z",
    "kish_effective_count",
    "matrix_on_pair_dates",
    "max_effective_count",
    "nested_shift",
    "nested_z",
    "normal_quantile",
    "one_day",
    "own_standardise",
    "parse_measure",
    "window_problem",
    "stream",
    "strength",
    "stream_on_pair_dates",
    "tile",
    "two_sided_p",
]
