"""monitor.engine.pairdates: every pair on its own dates, whatever else the matrix holds.

References: pandas ``Series.rolling(W).corr`` / ``ewm(halflife=H).corr`` and
``scipy.stats.spearmanr`` on the rows where both sides have a return; the bias of a
holiday-spanning return by simulation (normal and Student t(4) returns).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor.engine import (
    matrix_on_pair_dates,
    own_standardise,
    stream,
    stream_on_pair_dates,
)
from monitor.engine.scaling import standardise


def _calendars(rows: int = 400, seed: int = 8) -> np.ndarray:
    """Seeded returns of five instruments on three calendars plus a scattered gap."""
    rng = np.random.default_rng(seed)
    common = rng.standard_t(5, size=(rows, 1))
    values = 0.01 * (0.7 * common + rng.standard_t(5, size=(rows, 5)))
    values[np.arange(13, rows, 29), 0:2] = np.nan  # market one's holidays
    values[np.arange(5, rows, 41), 2] = np.nan  # market two's
    values[:30, 3] = np.nan  # a late listing
    values[200, 4] = np.nan  # one missing day
    return values


def _own(values: np.ndarray, i: int, j: int) -> pd.DataFrame:
    frame = pd.DataFrame(values[:, [i, j]], columns=["a", "b"])
    return frame.dropna()


PAIRS = np.array([(i, j) for i in range(5) for j in range(i + 1, 5)], dtype=np.int64)


@pytest.mark.parametrize("measure", ["rolling:40", "ewma:hl=15", "rank:40"])
def test_each_pair_equals_the_measure_on_its_own_dates(measure: str) -> None:
    values = _calendars()
    days = list(stream_on_pair_dates(values, measure, PAIRS))
    assert len(days) == len(values)
    got = np.array([d.value for d in days])
    checked = 0
    for p, (i, j) in enumerate(PAIRS):
        own = _own(values, i, j)
        with np.errstate(invalid="ignore", divide="ignore"):
            if measure.startswith("rolling"):
                reference = own["a"].rolling(40).corr(own["b"])
            elif measure.startswith("ewma"):
                reference = own["a"].ewm(halflife=15).corr(own["b"])
            else:  # Spearman of each window of 40 own dates (scipy)
                reference = pd.Series(
                    [stats.spearmanr(own["a"].iloc[k - 39:k + 1],
                                     own["b"].iloc[k - 39:k + 1]).statistic
                     if k >= 39 else np.nan for k in range(len(own))], index=own.index)
        # laid on every row: a row without both keeps the last own value
        expected = reference.reindex(range(len(values)), method="ffill").to_numpy()
        finite = np.isfinite(expected) & np.isfinite(got[:, p])
        assert finite.sum() > 250
        np.testing.assert_allclose(got[finite, p], expected[finite], rtol=0, atol=1e-10)
        if measure != "ewma:hl=15":  # the EWMA's minimum effective count differs from pandas'
            assert np.array_equal(np.isnan(got[:, p]), np.isnan(expected)), (i, j)
        checked += 1
    assert checked == len(PAIRS)


def test_another_instrument_on_other_dates_changes_nothing() -> None:
    values = _calendars()
    # a column trading only on days the others do not: new rows appear in the matrix
    extra_rows = np.arange(3, len(values), 17)
    wide = np.insert(values, extra_rows, np.nan, axis=0)
    extra = np.full((len(wide), 1), np.nan)
    inserted = extra_rows + np.arange(len(extra_rows))
    extra[inserted, 0] = 0.01
    extra[inserted[1::2], 0] = -0.02
    wide = np.hstack([wide, extra])
    original_rows = np.setdiff1d(np.arange(len(wide)), inserted)
    for measure in ("rolling:40", "ewma:hl=15,scale=vol", "rank:40"):
        alone = np.array([d.value for d in stream_on_pair_dates(values, measure, PAIRS)])
        with_extra = np.array([d.value for d in stream_on_pair_dates(wide, measure, PAIRS)])
        np.testing.assert_allclose(with_extra[original_rows], alone, rtol=0, atol=1e-12,
                                   err_msg=measure)
    # the engine on the union rows, by contrast, does change (the defect this fixes)
    plain = np.array([d.value for d in stream(values, "rolling:40,min=30", pairs=PAIRS)])
    union = np.array([d.value for d in stream(wide, "rolling:40,min=30", pairs=PAIRS)])
    assert np.nanmax(np.abs(union[original_rows] - plain)) > 1e-3


def test_a_later_start_gives_the_same_values_as_a_full_pass() -> None:
    values = _calendars()
    for measure in ("rolling:40", "ewma:hl=15"):
        full = [d.value for d in stream_on_pair_dates(values, measure, PAIRS)]
        part = list(stream_on_pair_dates(values, measure, PAIRS, start=250, stop=300))
        assert [d.t for d in part] == list(range(250, 300))
        np.testing.assert_allclose(np.array([d.value for d in part]), np.array(full[250:300]),
                                   rtol=0, atol=1e-12)


def test_the_matrix_layout_holds_the_same_values() -> None:
    values = _calendars()
    pairs = list(stream_on_pair_dates(values, "rolling:40", PAIRS, start=390))
    matrices = list(matrix_on_pair_dates(values, "rolling:40", start=390))
    for day, full in zip(pairs, matrices, strict=True):
        np.testing.assert_array_equal(full.value[PAIRS[:, 0], PAIRS[:, 1]], day.value)
        np.testing.assert_array_equal(full.value[PAIRS[:, 1], PAIRS[:, 0]], day.value)
        assert np.isnan(np.diag(full.value)).all()


def test_standardising_on_own_rows_skips_the_days_without_a_return() -> None:
    values = _calendars()
    scaled = own_standardise(values)
    for k in range(values.shape[1]):
        rows = np.flatnonzero(np.isfinite(values[:, k]))
        np.testing.assert_array_equal(scaled[rows, k], standardise(values[rows][:, [k]])[:, 0])
        assert np.isnan(np.delete(scaled[:, k], rows)).all()


@pytest.mark.parametrize("tails", ["normal", "student-t4"])
def test_a_return_spanning_a_holiday_pulls_r_towards_zero_by_about_r_over_2n(
    tails: str,
) -> None:
    """The README's figure: one date in a window of n where one side's return spans two
    days moves r by about -r / (2n). Simulated with the module's own pair dates."""
    rng = np.random.default_rng(19)
    n, rho, reps = 63, 0.9, 6000

    def shocks(size: tuple[int, ...]) -> np.ndarray:
        if tails == "normal":
            return rng.standard_normal(size)
        return rng.standard_t(4, size=size) / np.sqrt(2.0)

    shifts = []
    for _ in range(reps // 500):
        z1, z2 = shocks((n + 1, 500)), shocks((n + 1, 500))
        x = z1
        y = rho * z1 + np.sqrt(1 - rho**2) * z2
        # 500 pairs side by side: column pairs (k, 500 + k); y is shut on row 10
        closed = np.hstack([x, y])
        closed[10, 500:] = np.nan
        # y's own previous close: its return on row 11 spans rows 10 and 11
        closed[11, 500:] = y[10] + y[11]
        pairs = np.column_stack([np.arange(500), 500 + np.arange(500)])
        holiday = next(stream_on_pair_dates(closed, f"rolling:{n}", pairs, start=n)).value
        open_days = next(stream_on_pair_dates(np.hstack([x, y])[1:], f"rolling:{n}", pairs,
                                              start=n - 1)).value
        shifts.append(holiday - open_days)
    mean_shift = float(np.mean(np.concatenate(shifts)))
    assert mean_shift == pytest.approx(-rho / (2 * n), rel=0.15)


def _drifting(rows: int = 1500) -> np.ndarray:
    """A side whose returns are a drift plus noise a million times smaller, the drift
    changing on row 500 (so the window's mean is far from the history's), beside an
    ordinary side."""
    rng = np.random.default_rng(3)
    z = rng.standard_normal((rows, 2))
    x = np.where(np.arange(rows) < 500, 0.05, 0.0002) + 1e-8 * z[:, 0]
    y = 0.01 * (0.6 * z[:, 0] + 0.8 * z[:, 1])
    return np.column_stack([x, y])


def test_a_drifting_side_with_tiny_noise_is_never_flat() -> None:
    """References: numpy.corrcoef and scipy.stats.spearmanr of each window (two-pass),
    pandas ewm(halflife=21).corr for the EWMA."""
    values = _drifting()
    x, y = values[:, 0], values[:, 1]
    pair = np.array([[0, 1]])
    rows = range(62, len(values))
    for measure, reference in (
        ("rolling:63", [np.corrcoef(x[t - 62:t + 1], y[t - 62:t + 1])[0, 1] for t in rows]),
        ("rank:63", [stats.spearmanr(x[t - 62:t + 1], y[t - 62:t + 1]).statistic
                     for t in rows]),
    ):
        days = list(stream_on_pair_dates(values, measure, pair))[62:]
        assert not any(d.stale[0] for d in days), measure
        got = np.array([d.value[0] for d in days])
        np.testing.assert_allclose(got, reference, rtol=0, atol=1e-12, err_msg=measure)
    days = list(stream_on_pair_dates(values, "ewma:hl=21,min=1", pair))
    assert days[0].stale[0]  # one return: no variance yet
    assert not any(d.stale[0] for d in days[1:])
    got = np.array([d.value[0] for d in days])
    expected = pd.Series(x).ewm(halflife=21).corr(pd.Series(y)).to_numpy()
    np.testing.assert_allclose(got[30:], expected[30:], rtol=0, atol=1e-8)


def test_exactly_stale_closes_are_flat_until_a_move_enters_the_window() -> None:
    values = _drifting(400)[:, ::-1].copy()  # an ordinary side, then the one that stops
    values[:, 1] = 0.01 * np.random.default_rng(4).standard_normal(400)
    values[200:300, 1] = 0.0  # the close did not change for 100 days
    pair = np.array([[0, 1]])
    for measure in ("rolling:40", "rank:40"):
        days = list(stream_on_pair_dates(values, measure, pair))
        stale = np.array([d.stale[0] for d in days])
        value = np.array([d.value[0] for d in days])
        inside = np.arange(239, 300)  # windows wholly inside the flat stretch
        assert stale[inside].all() and np.isnan(value[inside]).all(), measure
        assert not stale[:239].any() and not stale[300:].any(), measure
        assert np.isfinite(value[300:]).all()
    days = list(stream_on_pair_dates(values, "ewma:hl=10", pair))
    # an EWMA keeps a value through a flat stretch after moves (its weights never vanish)
    assert not any(d.stale[0] for d in days)
