"""The desk's alert rules: configuration, targets and vectorised daily conditions.

Pure: numpy in, arrays and dataclasses out; no storage, clock or disk. See
:mod:`monitor.rules.inputs` for how the pipeline feeds one day to the rules.
"""

from __future__ import annotations

from monitor.rules.base import Rule
from monitor.rules.group_average import GroupAverageRule
from monitor.rules.inputs import Condition, DayInputs, MeasureDay, MeasureLike, take_pairs
from monitor.rules.jump import JumpRule
from monitor.rules.level import LevelRule
from monitor.rules.params import MeasureSpec, Param
from monitor.rules.registry import (
    RULE_KINDS,
    build_rules,
    lags_needed,
    measures_needed,
    pairs_needed,
    rule_parameters,
    rule_problems,
)
from monitor.rules.shift import ShiftRule
from monitor.rules.sign import SignRule
from monitor.rules.stale import StaleRule
from monitor.rules.stats import fisher_difference, two_sided_p
from monitor.rules.targets import (
    GroupTargets,
    PairLayout,
    PairTargets,
    SymbolTargets,
    Targets,
    pair_symbols,
    split_pair,
)

__all__ = [
    "RULE_KINDS",
    "GroupAverageRule",
    "Condition",
    "DayInputs",
    "GroupTargets",
    "JumpRule",
    "LevelRule",
    "MeasureDay",
    "MeasureLike",
    "MeasureSpec",
    "PairLayout",
    "PairTargets",
    "Param",
    "Rule",
    "ShiftRule",
    "SignRule",
    "StaleRule",
    "SymbolTargets",
    "Targets",
    "build_rules",
    "fisher_difference",
    "lags_needed",
    "measures_needed",
    "pair_symbols",
    "pairs_needed",
    "rule_parameters",
    "rule_problems",
    "split_pair",
    "take_pairs",
    "two_sided_p",
]
