"""Benjamini-Hochberg (1995) and Benjamini-Yekutieli (2001) in numpy, against
scipy.stats.false_discovery_control (general-purpose reference library) on the same
p-values, including ties and NaN (scipy is given the known p-values only)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import false_discovery_control

from monitor.rules.fdr import adjusted_p, rejected


@pytest.mark.parametrize("method", ["bh", "by"])
def test_adjusted_p_values_match_scipy(method: str) -> None:
    rng = np.random.default_rng(3)
    # A mix of nulls (uniform) and signals (tiny p-values), as on a day with a few breaks.
    p = np.concatenate([rng.uniform(size=300), rng.uniform(0, 1e-4, size=20)])
    rng.shuffle(p)
    ours = adjusted_p(p, method)  # type: ignore[arg-type]
    np.testing.assert_allclose(ours, false_discovery_control(p, method=method), rtol=1e-12)
    np.testing.assert_array_equal(rejected(p, 0.05, method),  # type: ignore[arg-type]
                                  false_discovery_control(p, method=method) <= 0.05)
    assert 0 < rejected(p, 0.05, method).sum() <= 25  # type: ignore[arg-type]


@pytest.mark.parametrize("method", ["bh", "by"])
def test_nan_p_values_take_no_part_and_ties_share_a_value(method: str) -> None:
    p = np.array([0.01, np.nan, 0.01, 0.04, 0.2, np.nan, 0.04, 0.001, 0.9, 0.01])
    known = ~np.isnan(p)
    ours = adjusted_p(p, method)  # type: ignore[arg-type]
    assert np.isnan(ours[~known]).all()
    np.testing.assert_allclose(ours[known], false_discovery_control(p[known], method=method),
                               rtol=1e-12)
    assert ours[0] == ours[2] == ours[9] and ours[3] == ours[6]
    flags = rejected(p, 0.05, method)  # type: ignore[arg-type]
    assert not flags[~known].any()
    np.testing.assert_array_equal(flags[known],
                                  false_discovery_control(p[known], method=method) <= 0.05)


def test_step_up_by_hand_and_empty_input() -> None:
    # m = 4, q = 0.05: thresholds k q / m = 0.0125, 0.025, 0.0375, 0.05. p_(3) = 0.03 <= 0.0375
    # so the three smallest are rejected although p_(2) = 0.028 > 0.025 (step-up).
    p = np.array([0.03, 0.001, 0.028, 0.5])
    np.testing.assert_array_equal(rejected(p, 0.05), [True, True, True, False])
    assert not rejected(p, 0.05, "by")[0]  # c_4 = 2.083: 0.03 * 4 * 2.083 / 3 > 0.05
    assert adjusted_p(np.array([])).shape == (0,)
    assert np.isnan(adjusted_p(np.array([np.nan, np.nan]))).all()
