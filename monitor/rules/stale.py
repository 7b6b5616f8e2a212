"""The ``stale`` rule: an instrument's closes stopped arriving or stopped changing.

Opens when an instrument has had no new close for ``after_days`` business days, or (with
``unchanged = true``, the default) its close has not changed for that long; clears as soon
as both counts are below ``after_days`` again. The pipeline supplies both counts per instrument
(:class:`~monitor.rules.inputs.DayInputs`); the target label is the symbol.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from monitor.rules.base import Rule, read_common
from monitor.rules.inputs import Condition, DayInputs
from monitor.rules.params import Param, TableReader
from monitor.rules.targets import SymbolTargets, Universe, resolve_symbols

SYMBOL_TARGET_PARAMETERS: tuple[Param, ...] = (
    Param("symbols", "str_list", "Instruments to watch."),
    Param("group", "str_or_list", "Watch every instrument of this group (or these groups)."),
    Param("all", "bool", "Watch every instrument of the desk.", default=False),
)


@dataclass(frozen=True, eq=False, kw_only=True)
class StaleRule(Rule):
    """No fresh (or no changed) close for ``after_days`` business days."""

    kind: ClassVar[str] = "stale"
    summary: ClassVar[str] = "An instrument has no new or no changed close for some days."
    target_parameters: ClassVar[tuple[Param, ...]] = SYMBOL_TARGET_PARAMETERS
    own_parameters: ClassVar[tuple[Param, ...]] = (
        Param("after_days", "int", "Business days without a fresh close that open.", default=3,
              minimum=1),
        Param("unchanged", "bool", "Also open when the close has not changed for `after_days`.",
              default=True),
    )

    targets: SymbolTargets
    after_days: int
    unchanged: bool

    @classmethod
    def from_table(
        cls, reader: TableReader, universe: Universe, default_measure: str | None
    ) -> StaleRule:
        common = read_common(reader)
        return cls(
            **common.fields(),
            targets=resolve_symbols(reader, universe),
            after_days=reader.read_int("after_days"),
            unchanged=reader.read_bool("unchanged"),
        )

    def evaluate(self, day: DayInputs) -> Condition:
        if day.days_without_close is None or (self.unchanged and day.days_unchanged is None):
            raise KeyError("DayInputs lacks days_without_close / days_unchanged for stale rules")
        symbols = self.targets.symbols
        days = np.take(np.asarray(day.days_without_close, dtype=np.float64), symbols)
        if self.unchanged and day.days_unchanged is not None:
            flat = np.take(np.asarray(day.days_unchanged, dtype=np.float64), symbols)
            known = np.isfinite(days) & np.isfinite(flat)
            days = np.fmax(days, flat)
        else:
            known = np.isfinite(days)
        return Condition.build(
            breach=(days >= self.after_days) & known,
            clear=(days < self.after_days) & known,
            known=known,
            value=days,
            level=float(self.after_days),
            excess=days - self.after_days,
        )
