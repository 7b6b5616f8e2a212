"""The ``level`` rule: a pair's correlation beyond a level the desk set, with a dead-band.

``above = 0.7`` opens when the correlation is above 0.7 and clears only once it is below
``clear`` (default ``0.7 - 0.05``); ``below`` mirrors it (default clear ``below + 0.05``).
Between the two the alert keeps its state, so a pair hovering at the level raises one
alert, not one a day. ``require_band = true`` opens only when the whole confidence band is
beyond the level (band low > above, or band high < below); clearing still looks at the
value itself.

The threshold reading and test are shared with the ``group-average`` rule.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Literal

import numpy as np

from monitor._typing import Float1D
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
from monitor.rules.inputs import Condition, DayInputs, MeasureLike
from monitor.rules.params import Param, TableReader
from monitor.rules.targets import IntArray, PairTargets, Universe, resolve_pairs

DEAD_BAND = 0.05
"""Default distance between the opening level and the clearing level."""

Side = Literal["above", "below"]

THRESHOLD_PARAMETERS: tuple[Param, ...] = (
    Param("above", "float", "Open when the value goes above this level.", minimum=-1, maximum=1),
    Param("below", "float", "Open when the value goes below this level.", minimum=-1, maximum=1),
    Param(
        "clear",
        "float",
        f"Clear only once the value is back past this level; defaults to the level "
        f"-/+ {DEAD_BAND} (below `above`, above `below`).",
        minimum=-1,
        maximum=1,
    ),
)


@dataclass(frozen=True)
class Threshold:
    """A level with its side and clearing level."""

    side: Side
    level: float
    clear_level: float


def read_threshold(reader: TableReader) -> Threshold:
    """Read exactly one of ``above`` / ``below`` and a ``clear`` on the safe side of it.

    Raises
    ------
    ConfigError
        Neither or both levels set, or ``clear`` not strictly on the safe side.
    """
    above = reader.read_float("above")
    below = reader.read_float("below")
    if above is not None and below is not None:
        raise reader.error("below", "set exactly one of above and below, not both")
    side: Side
    if above is not None:
        side, level = "above", above
    elif below is not None:
        side, level = "below", below
    else:
        raise reader.error("above", "missing required key (set exactly one of above and below)")
    clear = reader.read_float("clear")
    if clear is None:
        shifted = level - DEAD_BAND if side == "above" else level + DEAD_BAND
        # Rounded so the clearing level reads 0.65, not 0.6499999999999999, in digests.
        shifted = round(shifted, 12)
        return Threshold(side=side, level=level, clear_level=min(1.0, max(-1.0, shifted)))
    if side == "above" and not clear < level:
        raise reader.error(
            "clear", f"{clear!r} is on the wrong side of above = {level!r} (must be below it)"
        )
    if side == "below" and not clear > level:
        raise reader.error(
            "clear", f"{clear!r} is on the wrong side of below = {level!r} (must be above it)"
        )
    return Threshold(side=side, level=level, clear_level=clear)


def threshold_condition(
    threshold: Threshold,
    value: Float1D,
    *,
    test: Float1D | None = None,
    source: MeasureLike | None = None,
    n: Float1D | None = None,
) -> Condition:
    """Compare values (P,) with a threshold.

    Parameters
    ----------
    threshold : Threshold
        Side, opening level and clearing level.
    value : float array (P,)
        The measured value; NaN gives neither breach nor clear.
    test : float array (P,), optional
        What must be beyond the level to open (the band edge for ``require_band``);
        defaults to ``value``.
    source : MeasureLike, optional
        The measure the band and count are reported from.
    n : float array (P,), optional
        Count reported when it is not the measure's.
    """
    tested = value if test is None else test
    known = np.isfinite(value) & np.isfinite(tested)
    if threshold.side == "above":
        breach = tested > threshold.level
        clear = (value < threshold.clear_level) & known
        excess = tested - threshold.level
    else:
        breach = tested < threshold.level
        clear = (value > threshold.clear_level) & known
        excess = threshold.level - tested
    return Condition.build(
        breach=breach,
        clear=clear,
        known=known,
        value=value,
        level=threshold.level,
        excess=excess,
        source=source,
        n=n,
    )


@dataclass(frozen=True, eq=False, kw_only=True)
class LevelRule(Rule):
    """A pair's correlation above (or below) a level, held ``hold`` days, with dead-band."""

    kind: ClassVar[str] = "level"
    summary: ClassVar[str] = "The correlation goes above or below a level the desk set."
    own_parameters: ClassVar[tuple[Param, ...]] = (
        MEASURE_PARAMETER,
        *THRESHOLD_PARAMETERS,
        Param(
            "require_band",
            "bool",
            "Open only when the whole confidence band is beyond the level.",
            default=False,
        ),
        BAND_VARIANCE_PARAMETER,
    )

    targets: PairTargets
    measure: str
    threshold: Threshold
    require_band: bool
    variance: str = "robust"

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> LevelRule:
        common = read_common(reader)
        return cls(
            **common.fields(),
            targets=resolve_pairs(reader, universe),
            measure=read_measure(reader, "measure", default_measure).text,
            threshold=read_threshold(reader),
            require_band=reader.read_bool("require_band"),
            variance=reader.read_str("variance") or "robust",
        )

    def measures(self) -> list[str]:
        return [self.measure]

    def pairs_needed(self) -> IntArray:
        return self.targets.pairs

    def history_rows(self) -> int:
        return KURTOSIS_ROWS if self.require_band and self.variance == "robust" else 0

    def method_note(self) -> str | None:
        if not self.require_band:
            return None
        return f"{BAND_NOTES[self.variance]}: opens when the whole band is beyond the level."

    def evaluate(self, day: DayInputs) -> Condition:
        today = day.measure(self.measure, self.targets.pairs)
        test = None
        if self.require_band:
            low, high = band_of(self.variance, today, day, self.targets.pairs)
            test = low if self.threshold.side == "above" else high
        return threshold_condition(
            self.threshold, today.value, test=test, source=today
        )
