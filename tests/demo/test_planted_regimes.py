"""The engine sees a correlation change planted by the synthetic closes generator."""

from __future__ import annotations

import numpy as np

from monitor.demo.synthetic import two_regime_pair
from monitor.engine import adjacent_shift, one_day


def test_planted_change_shows_in_rolling_values_and_the_adjacent_shift_test() -> None:
    planted = two_regime_pair(seed=31, n_days=500, rho_before=0.1, rho_after=0.85, change_day=300)
    closes = planted.closes.to_numpy()
    returns = np.diff(np.log(closes), axis=0)  # row k is the return into day k + 1
    change_row = 299  # the return into day 300 is the first of the new regime
    window = 120
    before = one_day(returns, f"rolling:{window}", change_row - 1)
    after = one_day(returns, f"rolling:{window}", change_row + window - 1)
    # Fisher bands around each estimate contain the planted value
    assert before.low[0, 1] <= 0.1 <= before.high[0, 1]
    assert after.low[0, 1] <= 0.85 <= after.high[0, 1]
    shift = adjacent_shift(returns, change_row + window - 1, window=window)
    assert shift.z[0, 1] > 6 and shift.p[0, 1] < 1e-8
    quiet = adjacent_shift(returns, change_row - 1, window=window)
    assert abs(quiet.z[0, 1]) < 3
