"""The ``shift`` rule: a statistically significant change in a pair's correlation.

Two tests on Fisher's z = atanh(r):

* ``compare = "within"`` compares a short measure (``measure``, e.g. ``rolling:21``) with a
  longer baseline containing it (``baseline``, e.g. ``rolling:126``). The windows overlap, so the
  variance of the difference is 1/(n_s - 3) - 1/(n_l - 3), not the sum.
* ``compare = "previous"`` compares the latest W days with the W days before them (same
  ``rolling:W`` or ``rank:W`` measure, read ``W`` business days earlier); the windows are
  disjoint, so the variances add: 1/(n_now - 3) + 1/(n_before - 3).

    z = (atanh r_1 - atanh r_2) / sqrt(variance),   p = erfc(|z| / sqrt 2)  (two-sided)

For ``rank`` measures the variance is multiplied by 1.06, the large-sample variance of
atanh of Spearman's rho (Fieller, Hartley & Pearson 1957, Biometrika 44; constant typed
from memory). For EWMA measures n is the Kish effective count and the formula is an
approximation. Counts of 3 or fewer give NaN (no decision).

Variance (``variance``):

* ``robust`` (default): both measures are computed on returns standardised by their own
  lagged EWMA volatility (``scale=vol``, :mod:`monitor.engine.scaling`), and the Fisher
  variance is multiplied by the pair's tail factor ``phi >= 1`` from the two instruments'
  kurtoses over the last 252 rows of standardised returns
  (:mod:`monitor.engine.variance`, the delta-method variance of r for fat-tailed data).
* ``fisher``: plain returns and 1/(n - 3), which assumes independent normal returns.

Threshold: by default the opening level of |z| is calibrated to ``false_alarms`` expected
false alerts per pair per year (:mod:`monitor.rules.calibration`: the statistic's lag-1
autocorrelation from the window geometry and the exact upcrossing rate of a stationary
Gaussian sequence). An explicit ``z`` replaces it by a raw threshold with no stated rate.
With ``fdr = "bh"`` (Benjamini-Hochberg 1995) or ``"by"`` (Benjamini-Yekutieli 2001) the
day's two-sided p-values of all the rule's pairs with a decision go through the procedure
at false discovery rate ``fdr_level`` and a pair breaches when rejected
(:mod:`monitor.rules.fdr`); this bounds the share of false alerts among a day's alerts,
not a rate per pair per year. An alert opens after ``hold`` breach days and clears when
|z| < ``clear_z`` (default: the opening level - 1).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import ClassVar, Literal, cast

import numpy as np

from monitor.engine.bands import normal_quantile
from monitor.engine.spec import parse_measure
from monitor.engine.variance import KURTOSIS_ROWS, pair_tail_factor, window_tail_factor
from monitor.rules.base import (
    FALSE_ALARMS_PARAMETER,
    MEASURE_PARAMETER,
    Rule,
    read_common,
    read_false_alarms,
    read_measure,
)
from monitor.rules.calibration import shift_threshold
from monitor.rules.fdr import rejected
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.stats import fisher_difference, two_sided_p
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs

RANK_VARIANCE_FACTOR = 1.06
"""Spearman's atanh variance relative to Pearson's (Fieller, Hartley & Pearson 1957)."""

ShiftCompare = Literal["within", "previous"]
Variance = Literal["robust", "fisher"]
Fdr = Literal["none", "bh", "by"]
DEFAULT_FDR_LEVEL = 0.05

ROBUST_NOTE = (
    "robust variance (returns standardised by EWMA volatility, Fisher variance times the "
    "tail factor)"
)
FISHER_NOTE = "Fisher variance 1/(n - 3) (assumes independent normal returns)"
FDR_NAMES = {"bh": "Benjamini-Hochberg", "by": "Benjamini-Yekutieli"}


def scaled_text(text: str) -> str:
    """The measure ``text`` computed on volatility-standardised returns (``scale=vol``)."""
    return dataclasses.replace(parse_measure(text), scale="vol").text


@dataclass(frozen=True, eq=False, kw_only=True)
class ShiftRule(Rule):
    """Regime shift in a pair's correlation by a Fisher z test (within a baseline, or
    against the previous window)."""

    kind: ClassVar[str] = "shift"
    summary: ClassVar[str] = (
        "The correlation shifted significantly (Fisher z test, robust variance and a "
        "calibrated false-alarm rate by default)."
    )
    own_parameters: ClassVar[tuple[Param, ...]] = (
        MEASURE_PARAMETER,
        Param(
            "compare",
            "str",
            "within: the short `measure` against the longer `baseline` containing it; "
            "previous: the latest window against the window before it.",
            default="within",
            choices=("within", "previous"),
        ),
        Param("baseline", "str",
              "The longer measure containing `measure` (compare = 'within' only)."),
        Param(
            "variance",
            "str",
            "robust: standardised returns and the Fisher variance times the pair's tail "
            "factor; fisher: plain returns and 1/(n - 3).",
            default="robust",
            choices=("robust", "fisher"),
        ),
        FALSE_ALARMS_PARAMETER,
        Param(
            "z",
            "float",
            "A raw opening threshold on |z| instead of the one calibrated to `false_alarms` "
            "(no false-alarm rate is then stated).",
            minimum=0,
        ),
        Param(
            "clear_z",
            "float",
            "Clear when |z| is below this; defaults to the opening threshold - 1.",
            minimum=0,
        ),
        Param(
            "fdr",
            "str",
            "none: each pair against the threshold; bh or by: a pair breaches when the "
            "Benjamini-Hochberg (or Benjamini-Yekutieli) procedure over the day's pairs "
            "rejects it.",
            default="none",
            choices=("none", "bh", "by"),
        ),
        Param(
            "fdr_level",
            "float",
            f"False discovery rate q of `fdr` (0 < q < 1); defaults to {DEFAULT_FDR_LEVEL}.",
        ),
    )

    targets: PairTargets
    measure: str
    compare: ShiftCompare
    baseline: str | None
    window: int | None
    z_level: float
    clear_z: float
    factor: float
    variance: Variance = "robust"
    false_alarms: float | None = None
    fdr: Fdr = "none"
    fdr_level: float = DEFAULT_FDR_LEVEL

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> ShiftRule:
        common = read_common(reader)
        targets = resolve_pairs(reader, universe)
        short = read_measure(reader, "measure", default_measure)
        compare = cast(ShiftCompare, reader.read_str("compare"))
        baseline_text: str | None = None
        if compare == "within":
            if not reader.has("baseline"):
                raise reader.error(
                    "baseline", "missing required key (compare = 'within' needs it)")
            base = read_measure(reader, "baseline", None)
            if base.family != short.family or not short.is_shorter_than(base):
                raise reader.error(
                    "baseline",
                    f"{base.text!r} must be a longer measure of the same kind as "
                    f"measure = {short.text!r}",
                )
            baseline_text = base.text
        else:
            if reader.has("baseline"):
                raise reader.error("baseline", "only used with compare = 'within'")
            if short.window is None:
                raise reader.error(
                    "measure",
                    f"{short.text!r}: compare = 'previous' needs a window measure "
                    "(rolling:<days> or rank:<days>)",
                )
        variance = cast(Variance, reader.read_str("variance"))
        fdr = cast(Fdr, reader.read_str("fdr"))
        fdr_level = DEFAULT_FDR_LEVEL
        if reader.has("fdr_level"):
            if fdr == "none":
                raise reader.error("fdr_level", "only used with fdr = 'bh' or 'by'")
            fdr_level = reader.read_number("fdr_level")
            if not 0.0 < fdr_level < 1.0:
                raise reader.error("fdr_level", f"{fdr_level!r} must be above 0 and below 1")
        raw_z = reader.read_float("z")
        false_alarms: float | None = read_false_alarms(reader)
        if raw_z is not None:
            if reader.has("false_alarms"):
                raise reader.error(
                    "z", "set either z (a raw threshold) or false_alarms, not both"
                )
            if fdr != "none":
                raise reader.error(
                    "z", f"not used with fdr = {fdr!r} (the day's p-values decide)"
                )
            z_level, false_alarms = raw_z, None
        else:
            engine_baseline = None if baseline_text is None else parse_measure(baseline_text)
            z_level, _ = shift_threshold(
                cast(float, false_alarms), parse_measure(short.text), engine_baseline
            )
        if fdr != "none":
            false_alarms = None
        clear_z = reader.read_float("clear_z")
        if clear_z is None:
            clear_z = max(0.0, z_level - 1.0)
        elif not clear_z < z_level:
            raise reader.error("clear_z", f"{clear_z!r} must be below z = {z_level!r}")
        measure_text = short.text
        if variance == "robust":
            measure_text = scaled_text(measure_text)
            baseline_text = None if baseline_text is None else scaled_text(baseline_text)
        return cls(
            **common.fields(),
            targets=targets,
            measure=measure_text,
            compare=compare,
            baseline=baseline_text,
            window=short.window,
            z_level=z_level,
            clear_z=clear_z,
            factor=RANK_VARIANCE_FACTOR if short.family == "rank" else 1.0,
            variance=variance,
            false_alarms=false_alarms,
            fdr=fdr,
            fdr_level=fdr_level,
        )

    def measures(self) -> list[str]:
        return [self.measure] if self.baseline is None else [self.measure, self.baseline]

    def lags(self) -> list[tuple[str, int]]:
        if self.compare == "previous" and self.window is not None:
            return [(self.measure, self.window)]
        return []

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def history_rows(self) -> int:
        return KURTOSIS_ROWS if self.variance == "robust" else 0

    def method_note(self) -> str:
        variance = ROBUST_NOTE if self.variance == "robust" else FISHER_NOTE
        if self.fdr != "none":
            rule = (f"a pair breaches when {FDR_NAMES[self.fdr]} at false discovery rate "
                    f"{self.fdr_level:g} over the day's pairs rejects it")
        elif self.false_alarms is not None:
            rule = (f"threshold |z| > {self.z_level:.2f} for {self.false_alarms:g} false "
                    "alerts per pair per year")
        else:
            rule = f"raw threshold |z| > {self.z_level:g} (no false-alarm rate stated)"
        return f"{variance}; {rule}."

    def tail_factor(self, day: DayInputs) -> np.ndarray:
        """The pairs' tail factors phi (P_rule,) from today's standardised history: the
        larger of the long-run factor (252 rows) and the factor of each tested window that
        is shorter than the history (the short window of a `within` comparison; both windows
        of a `previous` one), so that a window holding a stress day gets its own wider variance."""
        if day.scaled_history is None:
            raise KeyError("DayInputs.scaled_history is missing (variance = 'robust')")
        history, pairs = day.scaled_history, self.targets.pairs
        phi = pair_tail_factor(history, pairs)
        window = self.window
        if window is not None:
            skips = (0,) if self.baseline is not None else (0, window)
            for skip in skips:
                phi = np.fmax(phi, window_tail_factor(history, pairs, rows=window, skip=skip))
        return phi

    def evaluate(self, day: DayInputs) -> Condition:
        pairs = self.targets.pairs
        today = day.measure(self.measure, pairs)
        if self.baseline is not None:
            other = day.measure(self.baseline, pairs)
        else:
            other = day.lagged_measure(self.measure, self.window or 0, pairs)
        z = fisher_difference(
            today.value, today.n, other.value, other.n,
            nested=self.baseline is not None, factor=self.factor,
        )
        if self.variance == "robust":
            z /= np.sqrt(self.tail_factor(day))
        size = np.abs(z)
        known = np.isfinite(z)
        if self.fdr == "none":
            breach = size > self.z_level
        else:
            breach = self._fdr_breach(z, size, known)
        clear = (size < self.clear_z) & ~breach
        excess = np.subtract(size, self.z_level, out=size)
        return Condition.build(
            breach=breach,
            clear=clear,
            known=known,
            value=today.value,
            level=self.z_level,
            excess=excess,
            source=today,
            z=z,
            reference=other.value,
        )

    def _fdr_breach(self, z: np.ndarray, size: np.ndarray, known: np.ndarray) -> np.ndarray:
        # Only a p-value at most q can be rejected, so the exact (and slow, elementwise)
        # p-value is computed for |z| beyond the two-sided q quantile only; the other known
        # pairs count as p = 1, which keeps m and every rejection unchanged.
        with np.errstate(invalid="ignore"):
            candidates = np.flatnonzero(size >= normal_quantile(1.0 - self.fdr_level))
        p = np.where(known, 1.0, np.nan)
        p[candidates] = two_sided_p(z[candidates])
        return rejected(p, self.fdr_level, cast(Literal["bh", "by"], self.fdr))
