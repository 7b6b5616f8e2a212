"""The engine on published data sets with known correlations (files in ../shared/data)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from monitor.engine import one_day
from tests.engine_reference import anscombe_sets, norris


def test_anscombe_quartet_each_set_has_r_0816() -> None:
    """Anscombe (1973), The American Statistician 27(1):17-21: r = 0.816 (3 dp) in all four
    sets; the sets are fed to the engine as two return columns of one window. The published
    figure is the value cut at three decimals (set IV gives 0.8165), hence the interval."""
    sets = anscombe_sets()
    assert sorted(sets) == ["I", "II", "III", "IV"]
    for x, y in sets.values():
        day = one_day(np.stack([x, y], axis=1), f"rolling:{x.size}")
        assert 0.816 <= day.value[0, 1] < 0.817
        assert day.value[0, 1] == pytest.approx(np.corrcoef(x, y)[0, 1], abs=1e-14)
        assert day.n[0, 1] == 11


def test_nist_norris_correlation_equals_the_certified_r_squared() -> None:
    """NIST StRD Norris: certified R-squared 0.999993745883712, so |r| = 0.999996872936967."""
    x, y = norris()
    assert x.size == 36
    day = one_day(np.stack([x, y], axis=1), "rolling:36")
    assert day.value[0, 1] == pytest.approx(math.sqrt(0.999993745883712), abs=1e-12)
