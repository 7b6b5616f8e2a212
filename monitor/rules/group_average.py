"""The ``group-average`` rule: a group's average pairwise correlation crosses a level.

The average is the plain mean of the correlations of all pairs within the group that have
a value today (common practice for a group's "average correlation"); it is NaN when fewer
than ``min_coverage`` of the group's pairs have one, so a thinly populated day cannot raise
an alert on a handful of pairs. Levels, dead-band and ``hold`` work as for ``level``. The
target label is the group name and ``n`` reports how many pairs the average used.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from monitor.rules.base import MEASURE_PARAMETER, Rule, read_common, read_measure
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.level import THRESHOLD_PARAMETERS, Threshold, read_threshold, threshold_condition
from monitor.rules.params import Param, TableReader
from monitor.rules.targets import GroupTargets, IntArray, Universe, resolve_groups

GROUP_TARGET_PARAMETERS: tuple[Param, ...] = (
    Param("group", "str_or_list", "The group (or groups) whose average correlation is watched."),
    Param("all", "bool", "Watch every group of two or more instruments.", default=False),
)


@dataclass(frozen=True, eq=False, kw_only=True)
class GroupAverageRule(Rule):
    """A group's average pairwise correlation above (or below) a level."""

    kind: ClassVar[str] = "group-average"
    summary: ClassVar[str] = "A group's average pairwise correlation crosses a level."
    target_parameters: ClassVar[tuple[Param, ...]] = GROUP_TARGET_PARAMETERS
    own_parameters: ClassVar[tuple[Param, ...]] = (
        MEASURE_PARAMETER,
        *THRESHOLD_PARAMETERS,
        Param(
            "min_coverage",
            "float",
            "Share of the group's pairs that must have a value for the average to count.",
            default=0.5,
            minimum=0.01,
            maximum=1,
        ),
    )

    targets: GroupTargets
    measure: str
    threshold: Threshold
    min_coverage: float

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> GroupAverageRule:
        common = read_common(reader)
        return cls(
            **common.fields(),
            targets=resolve_groups(reader, universe),
            measure=read_measure(reader, "measure", default_measure).text,
            threshold=read_threshold(reader),
            min_coverage=reader.read_number("min_coverage"),
        )

    def measures(self) -> list[str]:
        return [self.measure]

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def evaluate(self, day: DayInputs) -> Condition:
        groups = self.targets
        values = day.measure(self.measure, groups.pairs).value
        present = np.isfinite(values)
        count = len(groups)
        used = np.bincount(groups.group_of_pair, weights=present, minlength=count).astype(
            np.float64
        )
        total = np.bincount(groups.group_of_pair, minlength=count).astype(np.float64)
        sums = np.bincount(
            groups.group_of_pair, weights=np.where(present, values, 0.0), minlength=count
        )
        enough = (used > 0) & (used >= self.min_coverage * total)
        with np.errstate(invalid="ignore", divide="ignore"):
            average = np.where(enough, sums / used, np.nan)
        return threshold_condition(self.threshold, average, n=used)
