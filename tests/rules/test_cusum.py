"""The ``cusum`` rule: its statistic, its calibrated boundary, detection, config errors,
resumption.

Sources: CUSUM, Page (1954), Biometrika 41; exponential growth of the run length in the
boundary, Siegmund (1985), Sequential Analysis; the detection-delay floor, Lorden (1971),
Annals of Mathematical Statistics 42. All data is simulated with seeded numpy.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from monitor.alerts.book import AlertBook, AlertEvent
from monitor.alerts.replay import make_plan, replay
from monitor.bench.alert_quality import WARM_UP, break_panel, constant_panel, t_floor
from monitor.errors import ConfigError
from monitor.rules import Rule, build_rules
from monitor.rules import sequential as seq
from monitor.rules.cusum import CusumRule

BASELINE, HORIZON, CHANGE = 252, 126, 0.35


def _symbols(n: int) -> list[str]:
    return [f"SIM{k:03d}" for k in range(n)]


def _rules(n: int, **table: object) -> list[Rule]:
    base: dict[str, object] = {"name": "c", "kind": "cusum", "all": True}
    base.update(table)
    return build_rules([base], symbols=_symbols(n), groups={})


def _dates(rows: int) -> list:  # type: ignore[type-arg]
    import pandas as pd

    return [d.date() for d in pd.bdate_range("2010-01-04", periods=rows)]


def _events(returns: np.ndarray, rules: list[Rule], book: AlertBook, **kw: int
            ) -> list[AlertEvent]:
    plan = make_plan(rules, _symbols(returns.shape[1]), level=0.95)
    return [e for day in replay(returns, _dates(returns.shape[0]), plan, book, **kw)
            for e in day.events]


# --- the statistic ------------------------------------------------------------------------


def _slow_evidence(x: np.ndarray, y: np.ndarray, baseline: int, horizon: int,
                   change: float) -> tuple[float, float, float, int]:
    """One pair, the obvious way: loops over alternatives and starts, scalar maths."""
    x, y = x[-(baseline + horizon):], y[-(baseline + horizon):]
    bx, by = x[:baseline], y[:baseline]
    ok = np.isfinite(bx) & np.isfinite(by)
    if ok.sum() < seq.MIN_BASELINE_FRACTION * baseline:
        return math.nan, math.nan, math.nan, horizon
    rho0 = float(np.corrcoef(bx[ok], by[ok])[0, 1])  # numpy.corrcoef: outside reference
    mx, my, sx, sy = bx[ok].mean(), by[ok].mean(), bx[ok].std(), by[ok].std()
    ref = min(max(rho0, -seq.RHO_LIMIT), seq.RHO_LIMIT)
    nu = seq.LIKELIHOOD_DF

    def logpdf(u: float, v: float, rho: float) -> float:
        q = 1 - rho * rho
        return -0.5 * math.log(q) - (nu + 2) / 2 * math.log1p(
            (u * u - 2 * rho * u * v + v * v) / (q * (nu - 2)))

    best, start = 0.0, horizon
    for factor in seq.ALTERNATIVES:
        for sign in (1.0, -1.0):
            rho1 = min(max(ref + sign * change * factor, -seq.RHO_LIMIT), seq.RHO_LIMIT)
            for s in range(horizon):
                total = 0.0
                for k in range(s, horizon):
                    xv, yv = x[baseline + k], y[baseline + k]
                    if math.isnan(xv) or math.isnan(yv):
                        continue
                    u, v = (xv - mx) / sx, (yv - my) / sy
                    total += logpdf(u, v, rho1) - logpdf(u, v, ref)
                if total > best + 1e-12:
                    best, start = total, s
    tail_x, tail_y = x[baseline + start:], y[baseline + start:]
    ok = np.isfinite(tail_x) & np.isfinite(tail_y)
    since = float(np.corrcoef(tail_x[ok], tail_y[ok])[0, 1]) if ok.sum() >= 3 else math.nan
    return best, rho0, since, start


def test_vectorised_statistic_equals_a_per_pair_loop() -> None:
    rng = np.random.default_rng(3)
    baseline, horizon, pairs = 40, 25, 6
    rows = baseline + horizon + 5
    x = rng.standard_normal((rows, pairs))
    y = 0.5 * x + rng.standard_normal((rows, pairs))
    y[-12:, 1] = -x[-12:, 1] + 0.3 * rng.standard_normal(12)  # a break near the end
    x[rng.random((rows, pairs)) < 0.05] = np.nan  # scattered gaps
    x[:, 4] = np.nan  # a pair without a baseline
    found = seq.evidence(x, y, baseline=baseline, horizon=horizon, change=0.3)
    for p in range(pairs):
        slow = _slow_evidence(x[:, p], y[:, p], baseline, horizon, 0.3)
        if math.isnan(slow[0]):
            assert math.isnan(found.evidence[p])
            continue
        assert found.evidence[p] == pytest.approx(slow[0], rel=1e-9, abs=1e-9)
        assert found.reference[p] == pytest.approx(slow[1], rel=1e-12)
        assert found.start[p] == slow[3]
        if math.isnan(slow[2]):
            assert math.isnan(found.since_change[p])
        else:
            assert found.since_change[p] == pytest.approx(slow[2], rel=1e-9)
    assert found.evidence[1] > 5.0 and found.since_change[1] < -0.5


def test_pairs_in_blocks_give_the_same_statistic(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(4)
    history = rng.standard_normal((70, 7))
    pairs = np.array([(i, j) for i in range(7) for j in range(i + 1, 7)], dtype=np.int64)
    whole = seq.pair_evidence(history, pairs, baseline=40, horizon=25, change=0.3)
    monkeypatch.setattr(seq, "PAIR_BLOCK", 4)
    blocks = seq.pair_evidence(history, pairs, baseline=40, horizon=25, change=0.3)
    assert len(blocks.evidence) == len(pairs)
    # numpy's column reductions may round the last bit differently for other array
    # widths; the same rule (same pairs) always gives the same bits, which is what
    # reruns need.
    np.testing.assert_array_equal(blocks.start, whole.start)
    for name in ("evidence", "reference", "since_change"):
        np.testing.assert_allclose(getattr(blocks, name), getattr(whole, name), rtol=1e-12)
    k = 9
    alone = seq.evidence(history[:, pairs[k, :1]], history[:, pairs[k, 1:]], baseline=40,
                         horizon=25, change=0.3)
    assert alone.evidence[0] == pytest.approx(whole.evidence[k], rel=1e-12)


def test_kullback_leibler_matches_the_general_normal_formula() -> None:
    # KL(N1 || N0) = 0.5 (tr(S0^-1 S1) - k + log(det S0 / det S1)) for k-variate normals
    # (textbook formula, from memory), here with unit variances.
    for rho0, rho1 in ((0.6, -0.1), (0.6, 0.3), (-0.2, 0.5)):
        s0 = np.array([[1, rho0], [rho0, 1]])
        s1 = np.array([[1, rho1], [rho1, 1]])
        general = 0.5 * (np.trace(np.linalg.solve(s0, s1)) - 2
                         + math.log(np.linalg.det(s0) / np.linalg.det(s1)))
        assert seq.kullback_leibler(rho1, rho0) == pytest.approx(general, rel=1e-12)
    assert seq.lorden_floor(0.6, -0.1, 0.01) == pytest.approx(
        math.log(25200) / seq.kullback_leibler(-0.1, 0.6))


# --- the calibration ----------------------------------------------------------------------


@pytest.mark.slow
def test_the_stored_default_boundary_is_what_the_calibration_finds() -> None:
    for (rate, baseline, horizon, change), stored in seq.KNOWN_BOUNDARIES.items():
        # Equal to the last few bits: the engine's summation order (gappy tiles, clipping)
        # may move the final digit of the simulated statistic, nothing more.
        assert seq.calibrate(rate, baseline, horizon, change).boundary == pytest.approx(
            stored, rel=1e-12)


@pytest.mark.slow
@pytest.mark.parametrize(("rate", "pairs", "days"), [(0.1, 96, 1600), (0.01, 150, 2520)])
def test_calibrated_boundary_keeps_the_stated_rate_on_fresh_data(
    rate: float, pairs: int, days: int
) -> None:
    """Openings per pair-year at the calibrated boundary, on heavy-tailed data from a seed
    the calibration never saw: at or below the target up to the sampling error of the
    check (about 60 expected openings at 0.1, where two Poisson standard errors are
    +25 %, so 1.25 x target is allowed; 15 at 0.01, where the extrapolated fit errs on the
    safe side), and not below a quarter of it (the fit is meant to be tight, not merely
    safe)."""
    h = seq.boundary(rate, BASELINE, HORIZON, CHANGE)
    series = seq.simulate_null(seq.CALIBRATION_SEED + 1, pairs, days,
                               baseline=BASELINE, horizon=HORIZON, change=CHANGE)
    found = seq.openings(series, h) / (series.size / seq.BUSINESS_DAYS_PER_YEAR)
    assert rate / 4 <= found <= 1.25 * rate


# --- the rule in the replay ---------------------------------------------------------------


@pytest.mark.slow
def test_constant_correlation_fat_tailed_panel_stays_quiet() -> None:
    """t(4) shocks with a GARCH-like common variance, every pair at 0.36: at most 10 false
    alerts per 1,000 pair-years (issue 12), here 190 pairs over 5 years."""
    returns = constant_panel(41, 20, 1260, "t-garch")
    events = _events(returns, _rules(20), AlertBook())
    opened = [e for e in events if e.event == "opened"]
    pair_years = 190 * 1260 / 252
    assert len(opened) <= 10 * pair_years / 1000


@pytest.mark.parametrize("tail", ["normal", "t-garch"])
def test_planted_break_is_found_near_lordens_floor(tail: str) -> None:
    """0.6 -> -0.1: none of nine breaks is missed and the median delay is within 1.3 x
    Lorden's floor at 0.01 false alerts per pair-year (Lorden 1971; the goal of issue 12),
    the floor computed with the information of the data's own law (bivariate normal, or
    bivariate Student t(4) for the t panel). On normal returns that is also within the
    issue's 40 business days; on t(4) shocks the floor itself is about 38 days, so 40 is
    not a bound any detector at this rate can promise there."""
    breaks = np.array([WARM_UP + 250 + 7 * k for k in range(9)])
    panel = break_panel(8, 9, WARM_UP + 400 + 150, tail, -0.1, breaks)
    pairs = [f"SIM{2 * p:03d}/SIM{2 * p + 1:03d}" for p in range(9)]
    rules = build_rules([{"name": "c", "kind": "cusum", "pairs": pairs}],
                        symbols=_symbols(18), groups={})
    events = _events(panel, rules, AlertBook())
    delays = []
    for p, label in enumerate(pairs):
        days = [e.date for e in events if e.event == "opened" and e.target == label
                and e.date >= _dates(len(panel))[breaks[p]]]
        assert days, f"break on {label} not found"
        delays.append(_dates(len(panel)).index(days[0]) - int(breaks[p]) + 1)
    if tail == "normal":
        assert float(np.median(delays)) <= 40
        floor = seq.lorden_floor(0.6, -0.1, 0.01)
    else:
        floor = t_floor(0.6, -0.1, 0.01)
    assert float(np.median(delays)) <= 1.3 * floor
    first = next(e for e in events if e.event == "opened")
    assert first.reference > 0.3 and first.value < first.reference  # before vs since


def test_resumed_replay_gives_the_same_events_as_a_full_replay() -> None:
    breaks = np.array([WARM_UP + 150, WARM_UP + 200, WARM_UP + 260])
    panel = break_panel(5, 3, WARM_UP + 420, "t-garch", -0.1, breaks)
    rules = _rules(6)
    full = _events(panel, rules, AlertBook())
    assert any(e.event == "opened" for e in full)
    middle = WARM_UP + 230  # inside an open alert of the first break
    book = AlertBook()
    _events(panel, rules, book, stop_t=middle)
    resumed = _events(panel, rules, AlertBook.restore(book.snapshot()), from_t=middle)
    later = [e for e in full if e.date >= _dates(len(panel))[middle]]
    assert [_plain(e) for e in resumed] == [_plain(e) for e in later] and len(later) > 0


def _plain(event: AlertEvent) -> tuple[object, ...]:
    # NaN fields (no band for this rule) would make equal events compare unequal.
    return tuple("NaN" if isinstance(v, float) and math.isnan(v) else v
                 for v in dataclasses.astuple(event))


def test_rule_reports_its_method_and_reads_its_history() -> None:
    rule = _rules(4)[0]
    assert isinstance(rule, CusumRule)
    assert rule.history_rows() == BASELINE + HORIZON
    assert rule.boundary == seq.KNOWN_BOUNDARIES[(0.01, BASELINE, HORIZON, CHANGE)]
    assert "252-day baseline" in rule.method_note() and "0.01 false alerts" in rule.method_note()


# --- configuration errors -----------------------------------------------------------------


@pytest.mark.parametrize(
    ("key", "value", "words"),
    [
        ("false_alarms", 0.0, "must be above 0 and below 1"),
        ("false_alarms", 1.0, "must be above 0 and below 1"),
        ("horizon", 5, "below the minimum"),
        ("horizon", 300, "must not be longer than baseline"),
        ("baseline", 20, "below the minimum"),
        ("change", 0.0, "below the minimum"),
        ("change", 1.5, "above the maximum"),
        ("change", "big", "expected a number"),
    ],
)
def test_bad_keys_are_one_line_errors_naming_rule_and_key(
    key: str, value: object, words: str
) -> None:
    with pytest.raises(ConfigError) as info:
        _rules(4, **{key: value})
    message = str(info.value)
    assert message.startswith(f"rules[0] (c).{key}: ") and words in message
    assert "\n" not in message


def test_cusum_alerts_carry_no_normal_score_so_no_p_value_is_shown() -> None:
    """The evidence is a log-likelihood sum, not a z: an event must not turn it into a
    p-value (the digest would print a meaningless one)."""
    breaks = np.array([WARM_UP + 150])
    panel = break_panel(5, 1, WARM_UP + 330, "normal", -0.1, breaks)
    rules = _rules(2)
    opened = [e for e in _events(panel, rules, AlertBook()) if e.event == "opened"]
    assert opened
    for event in opened:
        assert math.isnan(event.z) and math.isnan(event.p)
        assert event.level > 0 and event.value < event.reference
