"""Long histories and large offsets: the running sums must not drift."""

from __future__ import annotations

from collections import deque
from collections.abc import Iterable

import numpy as np
import pytest

from monitor.engine import DayResult, one_day, stream
from tests.engine_reference import two_pass_correlation


def final(days: Iterable[DayResult]) -> DayResult:
    """The last day of a stream, consuming it without keeping the others."""
    return deque(days, maxlen=1)[0]


def last_window_reference(returns: np.ndarray, window: int) -> np.ndarray:
    block = returns[-window:]
    columns = returns.shape[1]
    out = np.eye(columns)
    for i in range(columns):
        for j in range(i + 1, columns):
            out[i, j] = out[j, i] = two_pass_correlation(block[:, i], block[:, j])
    return out


@pytest.mark.slow
def test_twenty_thousand_days_streamed_end_on_the_two_pass_value() -> None:
    rng = np.random.default_rng(2024)
    returns = rng.standard_normal((20_000, 4)) * np.array([0.01, 0.02, 0.005, 0.03])
    returns[:, 1] += 0.5 * returns[:, 0]
    returns[5000:5200] *= 1000.0  # an episode of huge moves the running sums must forget
    last = final(stream(returns, "rolling:63"))
    assert last.t == 19_999
    assert np.max(np.abs(last.value - last_window_reference(returns, 63))) <= 1e-12


@pytest.mark.parametrize("spec", ["rolling:63", "rolling:250,min=200"])
def test_large_common_offset_agrees_with_two_pass(spec: str) -> None:
    """Returns of mean 1e3 and deviation 1e-3: one-pass sums without centring would lose
    about twelve digits; the engine must still agree with a two-pass computation."""
    rng = np.random.default_rng(99)
    rows = 3000
    noise = rng.standard_normal((rows, 3)) * 1e-3
    noise[:, 2] += 0.7 * noise[:, 0]
    returns = 1e3 + noise
    window = int(spec.split(":")[1].split(",")[0])
    last = final(stream(returns, spec, start=rows - 300))
    assert np.max(np.abs(last.value - last_window_reference(returns, window))) <= 1e-12
    daily = one_day(returns, spec)
    assert np.max(np.abs(daily.value - last_window_reference(returns, window))) <= 1e-12


def test_large_offset_ewma_agrees_with_weighted_two_pass() -> None:
    rng = np.random.default_rng(7)
    rows = 2000
    returns = 1e3 + rng.standard_normal((rows, 2)) * 1e-3
    returns[:, 1] += 0.6 * (returns[:, 0] - 1e3)
    lam = 0.5 ** (1 / 21)
    w = lam ** np.arange(rows - 1, -1, -1)
    x = returns[:, 0] - np.sum(w * returns[:, 0]) / w.sum()
    y = returns[:, 1] - np.sum(w * returns[:, 1]) / w.sum()
    expected = np.sum(w * x * y) / np.sqrt(np.sum(w * x * x) * np.sum(w * y * y))
    last = final(stream(returns, "ewma:hl=21"))
    assert abs(last.value[0, 1] - expected) <= 1e-12
    assert abs(one_day(returns, "ewma:hl=21").value[0, 1] - expected) <= 1e-12
