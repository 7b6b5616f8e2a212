"""The ``cusum`` rule: a sequential monitor of a pair's correlation with a stated
false-alarm rate.

Every day, per pair, :func:`monitor.rules.sequential.evidence` weighs the last
``horizon`` rows of volatility-standardised returns against a reference correlation from
the ``baseline`` rows before them (window-limited CUSUMs of Student t log-likelihood
ratios for a change of ``change`` and of twice ``change``, up and down; Page 1954,
Biometrika 41). An alert opens when the evidence goes above the
boundary ``h``, calibrated by simulation so that a pair whose correlation never changes
raises ``false_alarms`` alerts per year on average, and clears when the evidence falls
below half of ``h``. Once a change is older than ``horizon`` rows it enters the baseline:
the reference moves onto the new regime and the monitor restarts from it.

The rule is a function of the trailing ``baseline + horizon`` rows only, so reruns and
resumed backfills give the same alerts. The condition reports: ``value`` = correlation of
the rows since the most likely change point, ``reference`` = the baseline correlation,
``level`` = ``h``, ``excess`` = evidence - ``h``. No z: the evidence is not a normal
score, so no p-value is shown for it and the digest orders these alerts by ``excess``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from monitor.rules.base import FALSE_ALARMS_PARAMETER, Rule, read_common, read_false_alarms
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.sequential import CLEAR_FRACTION, boundary, pair_evidence_of
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs


@dataclass(frozen=True, eq=False, kw_only=True)
class CusumRule(Rule):
    """A change in a pair's correlation, by CUSUM against a baseline, at a stated rate."""

    kind: ClassVar[str] = "cusum"
    summary: ClassVar[str] = ("The correlation changed, by accumulated evidence (CUSUM) at a "
                              "stated false-alarm rate.")
    own_parameters: ClassVar[tuple[Param, ...]] = (
        Param("baseline", "int", "Rows of the reference stretch that ends `horizon` rows "
              "before today.", default=252, minimum=60, maximum=2520),
        Param("horizon", "int", "Rows the evidence is accumulated over; a change older than "
              "this enters the baseline (the restart).", default=126, minimum=10,
              maximum=1260),
        Param("change", "float", "Correlation change each one-sided CUSUM is tuned to "
              "(a second one is tuned to twice it).", default=0.35, minimum=0.05,
              maximum=0.9),
        FALSE_ALARMS_PARAMETER,
    )

    targets: PairTargets
    baseline: int
    horizon: int
    change: float
    false_alarms: float
    boundary: float

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> CusumRule:
        common = read_common(reader)
        targets = resolve_pairs(reader, universe)
        baseline = reader.read_int("baseline")
        horizon = reader.read_int("horizon")
        if horizon > baseline:
            raise reader.error("horizon", f"{horizon!r} must not be longer than baseline = "
                               f"{baseline!r}")
        change = reader.read_number("change")
        false_alarms = read_false_alarms(reader)
        return cls(
            **common.fields(), targets=targets, baseline=baseline, horizon=horizon,
            change=change, false_alarms=false_alarms,
            boundary=boundary(false_alarms, baseline, horizon, change),
        )

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def history_rows(self) -> int:
        return self.baseline + self.horizon

    def method_note(self) -> str:
        return (f"CUSUM on volatility-standardised returns against a {self.baseline}-day "
                f"baseline over the last {self.horizon} days; boundary calibrated for "
                f"{self.false_alarms:g} false alerts per pair per year")

    def evaluate(self, day: DayInputs) -> Condition:
        x, y = day.pair_history(self.targets.pairs)
        found = pair_evidence_of(x, y, baseline=self.baseline, horizon=self.horizon,
                                 change=self.change)
        score = found.evidence
        known = np.isfinite(score)
        return Condition.build(
            breach=score > self.boundary,
            clear=(score < CLEAR_FRACTION * self.boundary) & known,
            known=known,
            value=found.since_change,
            level=self.boundary,
            excess=score - self.boundary,
            reference=found.reference,
        )
