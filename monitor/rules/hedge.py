"""The ``hedge`` rule: a hedge pair A/B whose regression no longer looks like a hedge.

Over the rule's window (``measure``, a ``beta:`` spec; R squared from the same window) it
opens when R squared falls below ``min_r2`` (default 0.80) or the hedge ratio (the slope of
B's returns on A's) leaves ``ratio_low .. ratio_high`` in absolute value (default 0.80 to
1.25). These defaults are common practice in hedge-effectiveness testing (no source); the
desk's own policy decides. Like the level rule it has a dead-band: an open alert clears only
once R squared is at least ``min_r2 + margin`` and the absolute ratio is inside
``ratio_low + margin .. ratio_high - margin`` (``margin`` default 0.05), and ``hold``
consecutive days are needed to open.

The alert's value is the ratio (with its band); its level is the end of the ratio range it
left, or ``min_r2`` when only R squared failed; ``reference`` carries R squared.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from monitor.engine.spec import parse_measure
from monitor.rules.base import Rule, read_common, read_measure
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs

MIN_R2 = 0.80
RATIO_LOW = 0.80
RATIO_HIGH = 1.25
MARGIN = 0.05
DEFAULT_MEASURE = "beta:63"


@dataclass(frozen=True, eq=False, kw_only=True)
class HedgeRule(Rule):
    """A pair's hedge ratio out of range or its R squared too low, held, with dead-band."""

    kind: ClassVar[str] = "hedge"
    summary: ClassVar[str] = ("A hedge pair's ratio (slope of B on A) leaves a range or its R "
                              "squared falls below a level.")
    own_parameters: ClassVar[tuple[Param, ...]] = (
        Param("measure", "str", "A beta: measure (beta:63, beta:hl=21); R squared comes from "
              f"the same window. Default {DEFAULT_MEASURE}."),
        Param("min_r2", "float", "Open when R squared falls below this (common practice, no "
              "source).", default=MIN_R2, minimum=0, maximum=1),
        Param("ratio_low", "float", "Open when the absolute hedge ratio falls below this "
              "(common practice, no source).", default=RATIO_LOW, minimum=0),
        Param("ratio_high", "float", "Open when the absolute hedge ratio goes above this "
              "(common practice, no source).", default=RATIO_HIGH, minimum=0),
        Param("margin", "float", "Dead-band: clear only once R squared is min_r2 + margin "
              "and the ratio is margin inside its range.", default=MARGIN, minimum=0),
    )

    targets: PairTargets
    measure: str
    r2_measure: str
    min_r2: float
    ratio_low: float
    ratio_high: float
    margin: float

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> HedgeRule:
        common = read_common(reader)
        spec = read_measure(reader, "measure", DEFAULT_MEASURE, correlation=False)
        parsed = parse_measure(spec.text)
        if parsed.output != "beta":
            raise reader.error("measure", f"{spec.text!r} is not a beta: measure "
                                          "(as beta:63 or beta:hl=21)")
        low = _number(reader, "ratio_low", RATIO_LOW)
        high = _number(reader, "ratio_high", RATIO_HIGH)
        margin = _number(reader, "margin", MARGIN)
        min_r2 = _number(reader, "min_r2", MIN_R2)
        if not low + 2 * margin < high:
            raise reader.error("ratio_high", f"{high!r} must exceed ratio_low + 2 x margin "
                                             f"({low + 2 * margin:g})")
        if min_r2 + margin > 1.0:
            raise reader.error("margin", f"min_r2 + margin = {min_r2 + margin:g} is above 1: "
                                         "the alert could never clear")
        return cls(
            **common.fields(),
            targets=resolve_pairs(reader, universe),
            measure=parsed.text,
            r2_measure=dataclasses.replace(parsed, output="r2").text,
            min_r2=min_r2,
            ratio_low=low,
            ratio_high=high,
            margin=margin,
        )

    def measures(self) -> list[str]:
        return [self.measure, self.r2_measure]

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def evaluate(self, day: DayInputs) -> Condition:
        ratio = day.measure(self.measure, self.targets.pairs)
        r2 = day.measure(self.r2_measure, self.targets.pairs).value
        beta = ratio.value
        size = np.abs(beta)
        known = np.isfinite(beta) & np.isfinite(r2)
        weak = r2 < self.min_r2
        low = size < self.ratio_low
        high = size > self.ratio_high
        breach = (weak | low | high) & known
        clear = ((r2 >= self.min_r2 + self.margin)
                 & (size >= self.ratio_low + self.margin)
                 & (size <= self.ratio_high - self.margin) & known)
        level = np.where(low, self.ratio_low, np.where(high, self.ratio_high, self.min_r2))
        excess = np.maximum.reduce([self.min_r2 - r2, self.ratio_low - size,
                                    size - self.ratio_high])
        return Condition.build(breach=breach, clear=clear, known=known, value=beta,
                               level=level, excess=excess, source=ratio, reference=r2)


def _number(reader: TableReader, key: str, default: float) -> float:
    value = reader.read_float(key)
    if value is None:
        return default
    if not np.isfinite(value):
        raise reader.error(key, f"{value!r} is not a finite number")
    return value
