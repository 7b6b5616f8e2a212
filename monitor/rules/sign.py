"""The ``sign`` rule: a pair's correlation has the opposite sign to the one expected.

``expected = "positive"`` opens when the whole confidence band is below zero (band high
< 0), so a noisy estimate that merely dips under zero does not count; it clears when the
band reaches zero again (band high >= 0), which includes the sign coming back.
``expected = "negative"`` mirrors it. A NaN band gives no decision.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Literal, cast

import numpy as np

from monitor.engine.variance import KURTOSIS_ROWS
from monitor.rules.base import (
    BAND_NOTES,
    BAND_VARIANCE_PARAMETER,
    MEASURE_PARAMETER,
    Rule,
    band_of,
    read_common,
    read_measure,
)
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs

Expected = Literal["positive", "negative"]


@dataclass(frozen=True, eq=False, kw_only=True)
class SignRule(Rule):
    """The confidence band lies entirely on the unexpected side of zero."""

    kind: ClassVar[str] = "sign"
    summary: ClassVar[str] = "The correlation's sign flipped, band clear of zero."
    own_parameters: ClassVar[tuple[Param, ...]] = (
        MEASURE_PARAMETER,
        Param("expected", "str", "The sign the pair normally has.", required=True,
              choices=("positive", "negative")),
        BAND_VARIANCE_PARAMETER,
    )

    targets: PairTargets
    measure: str
    expected: Expected
    variance: str = "robust"

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> SignRule:
        common = read_common(reader)
        return cls(
            **common.fields(),
            targets=resolve_pairs(reader, universe),
            measure=read_measure(reader, "measure", default_measure).text,
            expected=cast(Expected, reader.read_str("expected")),
            variance=reader.read_str("variance") or "robust",
        )

    def measures(self) -> list[str]:
        return [self.measure]

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def history_rows(self) -> int:
        return KURTOSIS_ROWS if self.variance == "robust" else 0

    def method_note(self) -> str:
        return f"{BAND_NOTES[self.variance]}: opens when the band lies beyond zero."

    def evaluate(self, day: DayInputs) -> Condition:
        today = day.measure(self.measure, self.targets.pairs)
        low, high = band_of(self.variance, today, day, self.targets.pairs)
        known = np.isfinite(low) & np.isfinite(high)
        # Distance of the band's near edge beyond zero on the unexpected side.
        excess = -high if self.expected == "positive" else low
        return Condition.build(
            breach=excess > 0,
            clear=(excess <= 0) & known,
            known=known,
            value=today.value,
            level=0.0,
            excess=excess,
            source=today,
        )
