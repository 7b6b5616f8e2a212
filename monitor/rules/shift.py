"""The ``shift`` rule: a statistically significant change in a pair's correlation.

Two tests on Fisher's z = atanh(r):

* ``test = "nested"`` compares a short measure (``measure``, e.g. ``rolling:21``) with a
  long one containing it (``long``, e.g. ``rolling:126``). The windows overlap, so the
  variance of the difference is 1/(n_s - 3) - 1/(n_l - 3), not the sum.
* ``test = "adjacent"`` compares the latest W days with the W days before them (same
  ``rolling:W`` or ``rank:W`` measure, read ``W`` business days earlier); the windows are
  disjoint, so the variances add: 1/(n_now - 3) + 1/(n_before - 3).

    z = (atanh r_1 - atanh r_2) / sqrt(variance),   p = erfc(|z| / sqrt 2)  (two-sided)

For ``rank`` measures the variance is multiplied by 1.06, the large-sample variance of
atanh of Spearman's rho (Fieller, Hartley & Pearson 1957, Biometrika 44; constant typed
from memory). For EWMA measures (nested only) n is the Kish effective count and the
formula is an approximation. An alert opens when |z| > ``z`` for ``hold`` days and clears
when |z| < ``clear_z`` (default ``z - 1``). Counts of 3 or fewer give NaN (no decision).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Literal, cast

import numpy as np

from monitor.rules.base import MEASURE_PARAMETER, Rule, read_common, read_measure
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.stats import fisher_difference
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs

RANK_VARIANCE_FACTOR = 1.06
"""Spearman's atanh variance relative to Pearson's (Fieller, Hartley & Pearson 1957)."""

ShiftTest = Literal["nested", "adjacent"]


@dataclass(frozen=True, eq=False, kw_only=True)
class ShiftRule(Rule):
    """Regime shift in a pair's correlation by a Fisher z test (nested or adjacent)."""

    kind: ClassVar[str] = "shift"
    summary: ClassVar[str] = "The correlation shifted significantly (Fisher z test)."
    own_parameters: ClassVar[tuple[Param, ...]] = (
        MEASURE_PARAMETER,
        Param(
            "test",
            "str",
            "nested: short `measure` inside the `long` one; adjacent: the latest window "
            "against the window before it.",
            default="nested",
            choices=("nested", "adjacent"),
        ),
        Param("long", "str", "The long measure containing `measure` (nested test only)."),
        Param("z", "float", "Open when |z| is above this.", default=3.0, minimum=0),
        Param("clear_z", "float", "Clear when |z| is below this; defaults to z - 1.", minimum=0),
    )

    targets: PairTargets
    measure: str
    test: ShiftTest
    long: str | None
    window: int | None
    z_level: float
    clear_z: float
    factor: float

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> ShiftRule:
        common = read_common(reader)
        targets = resolve_pairs(reader, universe)
        short = read_measure(reader, "measure", default_measure)
        test = cast(ShiftTest, reader.read_str("test"))
        long_text: str | None = None
        if test == "nested":
            if not reader.has("long"):
                raise reader.error("long", "missing required key (test = 'nested' needs it)")
            long = read_measure(reader, "long", None)
            if long.family != short.family or not short.is_shorter_than(long):
                raise reader.error(
                    "long",
                    f"{long.text!r} must be a longer measure of the same kind as "
                    f"measure = {short.text!r}",
                )
            long_text = long.text
        else:
            if reader.has("long"):
                raise reader.error("long", "only used with test = 'nested'")
            if short.window is None:
                raise reader.error(
                    "measure",
                    f"{short.text!r}: test = 'adjacent' needs a window measure "
                    "(rolling:<days> or rank:<days>)",
                )
        z_level = reader.read_number("z")
        clear_z = reader.read_float("clear_z")
        if clear_z is None:
            clear_z = max(0.0, z_level - 1.0)
        elif not clear_z < z_level:
            raise reader.error("clear_z", f"{clear_z!r} must be below z = {z_level!r}")
        return cls(
            **common.fields(),
            targets=targets,
            measure=short.text,
            test=test,
            long=long_text,
            window=short.window,
            z_level=z_level,
            clear_z=clear_z,
            factor=RANK_VARIANCE_FACTOR if short.family == "rank" else 1.0,
        )

    def measures(self) -> list[str]:
        return [self.measure] if self.long is None else [self.measure, self.long]

    def lags(self) -> list[tuple[str, int]]:
        if self.test == "adjacent" and self.window is not None:
            return [(self.measure, self.window)]
        return []

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def evaluate(self, day: DayInputs) -> Condition:
        pairs = self.targets.pairs
        today = day.measure(self.measure, pairs)
        if self.long is not None:
            other = day.measure(self.long, pairs)
        else:
            other = day.lagged_measure(self.measure, self.window or 0, pairs)
        z = fisher_difference(
            today.value, today.n, other.value, other.n,
            nested=self.long is not None, factor=self.factor,
        )
        size = np.abs(z)
        breach = size > self.z_level
        clear = size < self.clear_z
        excess = np.subtract(size, self.z_level, out=size)
        return Condition.build(
            breach=breach,
            clear=clear,
            known=np.isfinite(z),
            value=today.value,
            level=self.z_level,
            excess=excess,
            source=today,
            z=z,
            reference=other.value,
        )
