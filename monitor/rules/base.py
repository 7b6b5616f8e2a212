"""The rule base class and the settings every rule kind shares.

A rule is a stateless value object built once from its ``[[rules]]`` table: it knows its
targets, which measures (and lagged measures) it reads, and how to turn one day's inputs
into a :class:`~monitor.rules.inputs.Condition`. Streaks, open alerts and reminders are
state and live in :class:`monitor.alerts.AlertBook`, never in the rule.
"""

from __future__ import annotations

import dataclasses
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any, ClassVar, cast

import numpy as np

from monitor._typing import Float1D, Severity
from monitor.engine.variance import pair_tail_factor
from monitor.errors import SpecError
from monitor.rules.inputs import Condition, DayInputs, MeasureLike
from monitor.rules.params import NAME_PATTERN, MeasureSpec, Param, TableReader, _check_measure
from monitor.rules.stats import widened_band
from monitor.rules.targets import IntArray, Targets, Universe

SEVERITIES: tuple[str, ...] = ("info", "warning", "critical")

COMMON_PARAMETERS: tuple[Param, ...] = (
    Param("name", "str", "Unique name (letters, digits, '-', '_', '.').", required=True),
    Param("kind", "str", "level, shift, jump, sign, group-average, stale, cusum or hedge.",
          required=True),
    Param("severity", "str", "How urgent its alerts are.", default="warning", choices=SEVERITIES),
    Param(
        "remind_every",
        "int",
        "Business days between reminders of an open, unacknowledged alert; 0 never reminds.",
        default=5,
        minimum=0,
    ),
    Param(
        "hold",
        "int",
        "Consecutive business days the condition must hold before an alert opens.",
        default=1,
        minimum=1,
    ),
)

PAIR_TARGET_PARAMETERS: tuple[Param, ...] = (
    Param("pairs", "str_list", "Pairs to watch, each written 'A/B'."),
    Param("group", "str_or_list", "Watch every pair within this group (or each of these groups)."),
    Param("between", "str_list", "Watch every pair with one instrument in each of two groups."),
    Param("all", "bool", "Watch every pair of the desk's instruments.", default=False),
)

FALSE_ALARMS_PARAMETER = Param(
    "false_alarms",
    "float",
    "Expected false alerts per pair per year when nothing changes (0 < rate < 1); the "
    "opening threshold is calibrated to it.",
    default=0.01,
)
"""Shared by the statistical rule kinds, whose thresholds come from a stated rate."""


def read_false_alarms(reader: TableReader) -> float:
    """Read ``false_alarms``: a rate strictly between 0 and 1 per pair per year.

    Raises
    ------
    ConfigError
        Not a number, or outside (0, 1); the message names the rule, the key and the value.
    """
    rate = reader.read_number("false_alarms")
    if not 0.0 < rate < 1.0:
        raise reader.error(
            "false_alarms",
            f"{rate!r} must be above 0 and below 1 (expected false alerts per pair per year)",
        )
    return rate


BAND_VARIANCE_PARAMETER = Param(
    "variance",
    "str",
    "Band behind the decision: robust (Fisher band widened by the tail factor of the "
    "volatility-standardised returns) or fisher (independent normal returns).",
    default="robust",
    choices=("robust", "fisher"),
)
"""Shared by the rules that decide on a confidence band (``sign``, ``level`` with
``require_band``)."""

BAND_NOTES = {
    "robust": "robust band (Fisher band widened by the tail factor of the volatility-"
              "standardised returns); the desk's own level, no false-alarm rate stated",
    "fisher": "Fisher band (assumes independent normal returns); the desk's own level, no "
              "false-alarm rate stated",
}


MEASURE_PARAMETER = Param(
    "measure",
    "str",
    "Measure spec such as rolling:63, ewma:hl=21, ewma:lambda=0.94,mean=zero or rank:63; "
    "defaults to the desk's default measure.",
)


@dataclass(frozen=True)
class CommonSettings:
    """The settings every rule kind has, read and checked."""

    name: str
    severity: Severity
    remind_every: int
    hold: int

    def fields(self) -> dict[str, Any]:
        """The four as keyword arguments of a rule's constructor."""
        return dataclasses.asdict(self)


def read_common(reader: TableReader) -> CommonSettings:
    """Read ``name``, ``severity``, ``remind_every`` and ``hold``.

    Raises
    ------
    ConfigError
        Missing or malformed name, unknown severity, out-of-range counts.
    """
    name = reader.read_str("name")
    if not name or not NAME_PATTERN.match(name):
        raise reader.error(
            "name", f"{name!r} is not a valid rule name (letters, digits, '-', '_', '.')"
        )
    severity = cast(Severity, reader.read_str("severity"))
    return CommonSettings(
        name=name,
        severity=severity,
        remind_every=reader.read_int("remind_every"),
        hold=reader.read_int("hold"),
    )


def read_measure(reader: TableReader, key: str, default_measure: str | None, *,
                 correlation: bool = True) -> MeasureSpec:
    """Read and check a measure spec key, falling back on the desk's default measure.

    With `correlation` (every kind but `hedge`) the measure must be a correlation: the
    rule's levels, Fisher z statistics and bands are a correlation's, so a `beta:` or
    `r2:` spec is refused with the kind that reads it.

    Raises
    ------
    SpecError
        The spec cannot be parsed or its window is shorter than 3; the message names the
        rule and key.
    ConfigError
        The key is absent and there is no default measure.
    """
    text = reader.read_str(key)
    origin = ""
    if text is None:
        if default_measure is None:
            raise reader.error(key, "missing required key (no default measure is configured)")
        text, origin = default_measure, " (default)"
    try:
        spec = _check_measure(text)
    except SpecError as exc:
        raise SpecError(f"{reader.where(key)}{origin}: {exc}") from None
    if correlation:
        from monitor.engine.spec import parse_measure

        if parse_measure(spec.text).output != "r":
            raise SpecError(
                f"{reader.where(key)}{origin}: {spec.text!r} is a hedge ratio or R squared, "
                "not a correlation: this kind's levels and statistics are a correlation's "
                "(use it in a kind = \"hedge\" rule or in `comove series --measure`)")
    return spec


@dataclass(frozen=True, eq=False, kw_only=True)
class Rule(ABC):
    """Base of every rule kind.

    Attributes
    ----------
    name : str
        Unique rule name; part of every alert key.
    severity : {"info", "warning", "critical"}
        Carried onto the rule's alerts.
    remind_every : int
        Business days between reminders (0: never).
    hold : int
        Consecutive breach days needed to open an alert.
    targets : Targets
        What the rule watches, one entry per target (P_rule,).
    """

    name: str
    severity: Severity
    remind_every: int
    hold: int
    targets: Targets

    kind: ClassVar[str]
    summary: ClassVar[str]
    target_parameters: ClassVar[tuple[Param, ...]] = PAIR_TARGET_PARAMETERS
    own_parameters: ClassVar[tuple[Param, ...]] = ()

    @classmethod
    def parameters(cls) -> tuple[Param, ...]:
        """Every key this kind accepts: common, target and its own, in that order."""
        return COMMON_PARAMETERS + cls.target_parameters + cls.own_parameters

    @classmethod
    @abstractmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> Rule:
        """Build the rule from its table; raise ConfigError naming rule and key."""

    def measures(self) -> list[str]:
        """Canonical texts of the measures the rule reads today."""
        return []

    def measure_label(self) -> str:
        """The measures the rule reads as one label for people: joined with " vs " (a comma
        already separates a measure's own options, e.g. ``rolling:21,min=17``); "" for none."""
        return " vs ".join(self.measures())

    def lags(self) -> list[tuple[str, int]]:
        """``(measure text, lag)`` couples the rule reads from earlier days."""
        return []

    def pairs_needed(self) -> IntArray:
        """Pairs (M, 2) whose measure values the rule reads."""
        return np.empty((0, 2), dtype=np.int64)

    def history_rows(self) -> int:
        """Rows of standardised returns (:mod:`monitor.engine.scaling`) the rule reads,
        ending on the day evaluated (``DayInputs.scaled_history``); 0 for none."""
        return 0

    def method_note(self) -> str | None:
        """One sentence for the digest and pages: which variance and which false-alarm
        setting stand behind this rule's alerts; None for a rule on the desk's own levels."""
        return None

    @abstractmethod
    def evaluate(self, day: DayInputs) -> Condition:
        """The rule's condition today over its targets (P_rule,); no state, no I/O."""


def band_of(variance: str, measure: MeasureLike, day: DayInputs, pairs: IntArray
            ) -> tuple[Float1D, Float1D]:
    """The band a band rule decides on: the measure's Fisher band, or (``robust``) the same
    widened by the pairs' tail factor from today's standardised history."""
    if variance != "robust":
        return measure.low, measure.high
    if day.scaled_history is None:
        raise KeyError("DayInputs.scaled_history is missing (variance = 'robust')")
    phi = pair_tail_factor(day.scaled_history, pairs)
    return widened_band(measure.value, measure.low, measure.high, phi)
