"""The ``jump`` rule: a pair's correlation moved by at least ``delta`` over ``over_days`` days.

The move is value_t - value_{t-over_days} (the pipeline supplies the lagged value, see
:mod:`monitor.rules.inputs`). ``direction`` picks rises (``up``), falls (``down``) or
both (``either``, the default). An alert clears once the move over ``over_days`` is back under
half of ``delta`` in the watched direction, a dead-band so that a move hovering at
``delta`` does not flap.

``delta`` is a raw threshold on the change of the correlation, the desk's own choice: the
rule states no false-alarm rate. Correlations of short windows move a lot by chance on
fat-tailed returns (`comove bench alerts` measures it: with rolling:63 and delta 0.3 over
5 days, hundreds of alerts per 1,000 pair-years on t(4) shocks with clustered volatility);
for a tested change use ``shift`` or ``cusum``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Literal, cast

import numpy as np

from monitor.rules.base import MEASURE_PARAMETER, Rule, read_common, read_measure
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs

Direction = Literal["up", "down", "either"]

_TOLERANCE = 1e-12
"""Moves equal to ``delta`` count as breaches despite binary rounding of decimal values."""


@dataclass(frozen=True, eq=False, kw_only=True)
class JumpRule(Rule):
    """The correlation moved by at least ``delta`` over ``over_days`` business days."""

    kind: ClassVar[str] = "jump"
    summary: ClassVar[str] = ("The correlation moved by at least delta over a few days (a raw "
                              "threshold, no stated false-alarm rate).")
    own_parameters: ClassVar[tuple[Param, ...]] = (
        MEASURE_PARAMETER,
        Param("delta", "float", "Smallest move (absolute) that opens: a raw threshold on the "
              "change of the correlation, with no false-alarm rate behind it.", required=True,
              minimum=0.01, maximum=2),
        Param("over_days", "int", "Business days the move is measured over.", default=5, minimum=1),
        Param("direction", "str", "Which moves count.", default="either",
              choices=("up", "down", "either")),
    )

    targets: PairTargets
    measure: str
    delta: float
    over_days: int
    direction: Direction

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> JumpRule:
        common = read_common(reader)
        return cls(
            **common.fields(),
            targets=resolve_pairs(reader, universe),
            measure=read_measure(reader, "measure", default_measure).text,
            delta=reader.read_number("delta"),
            over_days=reader.read_int("over_days"),
            direction=cast(Direction, reader.read_str("direction")),
        )

    def measures(self) -> list[str]:
        return [self.measure]

    def lags(self) -> list[tuple[str, int]]:
        return [(self.measure, self.over_days)]

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def method_note(self) -> str:
        return (f"raw threshold: a move of at least {self.delta:g} over {self.over_days} business "
                "days; no false-alarm rate is stated (short-window correlations move a lot "
                "by chance).")

    def evaluate(self, day: DayInputs) -> Condition:
        pairs = self.targets.pairs
        today = day.measure(self.measure, pairs)
        before = day.lagged_measure(self.measure, self.over_days, pairs)
        move = today.value - before.value
        # The move in the watched direction: positive when it goes the alarming way.
        if self.direction == "up":
            signed = move
        elif self.direction == "down":
            signed = -move
        else:
            signed = np.abs(move)
        known = np.isfinite(move)
        return Condition.build(
            breach=signed >= self.delta - _TOLERANCE,
            clear=(signed < self.delta / 2.0) & known,
            known=known,
            value=today.value,
            level=self.delta,
            excess=signed - self.delta,
            source=today,
            reference=before.value,
        )
