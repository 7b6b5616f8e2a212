"""Tests of the seeded synthetic closes generator (monitor.demo.synthetic).

Checks use numpy and pandas directly, never the comove engine. Correlation tolerances
use the Fisher (1915, 1921) z-transform: atanh(r_hat) has standard error 1/sqrt(n - 3)
(REFERENCES.md), and every check allows four standard errors.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import replace
from datetime import date
from typing import Any

import numpy as np
import pandas as pd
import pytest

from monitor.demo.model import EPISODE_KINDS, Episode, Garch, InstrumentSpec, Scenario, trading_days
from monitor.demo.scenario import demo_hedge_pairs, demo_scenario
from monitor.demo.synthetic import (
    SyntheticCloses,
    generate,
    planted_correlation,
    to_long_csv_rows,
    two_regime_pair,
)
from monitor.errors import ConfigError

DEMO_START, DEMO_END = date(2021, 1, 4), date(2024, 12, 31)


def fisher_tolerance(n: int) -> float:
    """Four standard errors of atanh(r) for n observations (Fisher; REFERENCES.md)."""
    return 4.0 / math.sqrt(n - 3)


def assert_near_correlation(r_hat: float, n: int, *, rho: float) -> None:
    assert abs(math.atanh(r_hat) - math.atanh(rho)) < fisher_tolerance(n), (r_hat, rho, n)


def log_returns(closes: pd.DataFrame) -> pd.DataFrame:
    return np.log(closes).diff()


def shocks(out: SyntheticCloses) -> pd.DataFrame:
    """The planted unit-variance shocks: true log returns over conditional volatility."""
    return out.true_returns / out.volatility


def pair_corr(frame: pd.DataFrame, a: str, b: str) -> tuple[float, int]:
    both = frame[[a, b]].dropna()
    return float(np.corrcoef(both[a], both[b])[0, 1]), len(both)


def group_scenario(episodes: tuple[Episode, ...], **changes: Any) -> Scenario:
    """Five fictional equities on one factor (planted pairwise rho 0.25) and one bond."""
    equities = tuple(
        InstrumentSpec(code, f"{code} Holdings", "equities", loadings={"market": 0.5})
        for code in ("KLV", "ORMA", "VSKR", "TRQL", "PELV")
    )
    bond = InstrumentSpec(
        "TEZ10", "Tezar 10-year bond future", "rates", currency="TZP", vol=0.005,
        loadings={"market": -0.5, "rates": 0.6},
    )
    base = Scenario(
        instruments=(*equities, bond),
        factors=("market", "rates"),
        start=date(2022, 1, 3),
        end=date(2023, 12, 29),
        seed=11,
        episodes=episodes,
        missing_rate=0.0,
        garch=None,
    )
    return replace(base, **changes) if changes else base


# -- reproducibility -------------------------------------------------------------------


def test_same_seed_gives_identical_output() -> None:
    scenario = demo_scenario(DEMO_START, DEMO_END, seed=7)
    first, second = generate(scenario), generate(scenario)
    pd.testing.assert_frame_equal(first.closes, second.closes)
    pd.testing.assert_frame_equal(first.true_returns, second.true_returns)
    pd.testing.assert_frame_equal(first.volatility, second.volatility)


def test_different_seeds_give_different_closes() -> None:
    one = generate(demo_scenario(DEMO_START, DEMO_END, seed=7)).closes
    other = generate(demo_scenario(DEMO_START, DEMO_END, seed=8)).closes
    both = (one.notna() & other.notna()).to_numpy()
    differ = one.to_numpy()[both] != other.to_numpy()[both]
    assert differ.mean() > 0.99


# -- planted correlation ---------------------------------------------------------------


@pytest.mark.parametrize(
    ("rho_before", "rho_after"), [(0.7, 0.0), (-0.5, 0.6), (0.0, 0.9), (0.85, 0.3)]
)
def test_two_regime_pair_matches_targets_before_and_after_change(
    rho_before: float, rho_after: float
) -> None:
    change_day = 400
    out = two_regime_pair(seed=5, n_days=900, rho_before=rho_before, rho_after=rho_after,
                          change_day=change_day)
    returns = log_returns(out.closes)
    # Return at position t spans closes t-1 -> t; positions >= change_day are the new regime.
    before = returns.iloc[1:change_day]
    after = returns.iloc[change_day:]
    r_before = float(np.corrcoef(before["KLV"], before["ORMA"])[0, 1])
    r_after = float(np.corrcoef(after["KLV"], after["ORMA"])[0, 1])
    assert_near_correlation(r_before, len(before), rho=rho_before)
    assert_near_correlation(r_after, len(after), rho=rho_after)
    assert out.episodes[0].start == out.closes.index[change_day].date()


def test_two_regime_pair_with_garch_keeps_planted_shock_correlation() -> None:
    out = two_regime_pair(seed=9, n_days=1200, rho_before=0.8, rho_after=-0.2,
                          change_day=700, garch=Garch(alpha=0.08, beta=0.9))
    z = shocks(out)
    assert_near_correlation(*_corr_n(z.iloc[1:700]), rho=0.8)
    assert_near_correlation(*_corr_n(z.iloc[700:]), rho=-0.2)
    assert out.volatility["KLV"].std() > 0  # the volatility really moves under GARCH


def _corr_n(frame: pd.DataFrame) -> tuple[float, int]:
    return float(np.corrcoef(frame.iloc[:, 0], frame.iloc[:, 1])[0, 1]), len(frame)


def test_two_regime_pair_rejects_bad_parameters() -> None:
    with pytest.raises(ConfigError, match="rho_after"):
        two_regime_pair(seed=1, n_days=100, rho_before=0.5, rho_after=1.5, change_day=50)
    with pytest.raises(ConfigError, match="change_day"):
        two_regime_pair(seed=1, n_days=100, rho_before=0.5, rho_after=0.1, change_day=99)


def test_stress_raises_group_average_correlation_to_planted_level() -> None:
    stress = Episode("stress", date(2023, 3, 1), date(2023, 10, 31), group="equities",
                     common_weight=0.6, vol_scale=2.0, description="equity scare")
    scenario = group_scenario((stress,))
    out = generate(scenario)
    returns = log_returns(out.closes)
    inside = returns.loc["2023-03-01":"2023-10-31"]
    outside = returns.loc[:"2023-02-28"].iloc[1:]
    equities = ["KLV", "ORMA", "VSKR", "TRQL", "PELV"]
    # Model: loadings 0.5 give rho = 0.25; a common shock of weight w gives (1-w) rho + w.
    calm, stressed = 0.25, 0.4 * 0.25 + 0.6
    for frame, rho in ((outside, calm), (inside, stressed)):
        corr = np.corrcoef(frame[equities].to_numpy(), rowvar=False)
        for i in range(5):
            for j in range(i + 1, 5):
                assert_near_correlation(corr[i, j], len(frame), rho=rho)
    avg = {
        name: np.corrcoef(frame[equities].to_numpy(), rowvar=False)[np.triu_indices(5, 1)].mean()
        for name, frame in (("outside", outside), ("inside", inside))
    }
    assert avg["inside"] - avg["outside"] > 0.3
    planted = planted_correlation(scenario, date(2023, 6, 1))
    assert planted.loc["KLV", "ORMA"] == pytest.approx(stressed, abs=1e-12)
    assert planted.loc["KLV", "TEZ10"] == pytest.approx(-0.25 * math.sqrt(0.4), abs=1e-12)
    # Common practice: a sample sd from n normal draws has relative error about 1/sqrt(2n).
    ratio = inside["KLV"].std() / outside["KLV"].std()
    assert abs(ratio - 2.0) < 2.0 * 4 / math.sqrt(2 * len(inside))


def test_flip_changes_sign_of_bond_equity_correlation() -> None:
    flip = Episode("flip", date(2023, 1, 2), date(2023, 12, 29), symbols=("TEZ10",),
                   factor="market", description="bond moves with equities")
    out = generate(group_scenario((flip,)))
    returns = log_returns(out.closes)
    before = returns.loc[:"2022-12-30"].iloc[1:]
    during = returns.loc["2023-01-02":]
    r_before, n_before = pair_corr(before, "KLV", "TEZ10")
    r_during, n_during = pair_corr(during, "KLV", "TEZ10")
    assert r_before < 0 < r_during
    # Model: 0.5 * -0.5 = -0.25 before; the default flip multiplies the loading by -1.
    assert_near_correlation(r_before, n_before, rho=-0.25)
    assert_near_correlation(r_during, n_during, rho=0.25)


def test_decouple_drives_pair_correlation_to_zero() -> None:
    strong = {"market": 0.3, "industrials": 0.85}
    instruments = (
        InstrumentSpec("KLV", "Kelvara Industrial", "equities", loadings=strong),
        InstrumentSpec("DUNQ", "Dunquist Shipping", "equities", loadings=strong),
        InstrumentSpec("ORMA", "Orma Utilities", "equities", loadings={"market": 0.6}),
    )
    episode = Episode("decouple", date(2023, 1, 2), date(2023, 12, 29),
                      symbols=("KLV", "DUNQ"), description="hedge breaks")
    scenario = Scenario(instruments, ("market", "industrials"), date(2022, 1, 3),
                        date(2023, 12, 29), seed=3, episodes=(episode,), missing_rate=0.0)
    z = shocks(generate(scenario))
    planted = 0.3 * 0.3 + 0.85 * 0.85
    assert_near_correlation(*pair_corr(z.loc[:"2022-12-30"], "KLV", "DUNQ"), rho=planted)
    assert_near_correlation(*pair_corr(z.loc["2023-01-02":], "KLV", "DUNQ"), rho=0.0)
    assert_near_correlation(*pair_corr(z.loc["2023-01-02":], "KLV", "ORMA"), rho=0.0)


def test_episode_pushing_loadings_past_unit_variance_is_rejected() -> None:
    flip = Episode("flip", date(2023, 1, 2), date(2023, 2, 1), symbols=("TEZ10",),
                   factor="market", loading_scale=-2.0)
    with pytest.raises(ConfigError, match="TEZ10"):
        generate(group_scenario((flip,)))


# -- data faults -----------------------------------------------------------------------


def test_stale_repeat_gives_zero_returns_then_catches_up() -> None:
    stale = Episode("stale", date(2023, 5, 1), date(2023, 5, 12), symbols=("ORMA",))
    clean = generate(group_scenario(()))
    faulty = generate(group_scenario((stale,)))
    span = faulty.closes.loc["2023-05-01":"2023-05-12", "ORMA"]
    assert len(span) == 10
    before = faulty.closes["ORMA"].loc[:"2023-04-28"].iloc[-1]
    assert (span == before).all()
    assert (log_returns(faulty.closes).loc["2023-05-01":"2023-05-12", "ORMA"] == 0).all()
    # Outside the span the recorded closes are the market's: the first good close jumps back.
    outside = faulty.closes.index.difference(span.index)
    pd.testing.assert_series_equal(faulty.closes.loc[outside, "ORMA"],
                                   clean.closes.loc[outside, "ORMA"])


def test_stale_missing_gives_no_close_over_span() -> None:
    stale = Episode("stale", date(2023, 5, 1), date(2023, 5, 12), symbols=("KLV",),
                    stale_mode="missing")
    closes = generate(group_scenario((stale,))).closes
    assert closes.loc["2023-05-01":"2023-05-12", "KLV"].isna().all()
    assert closes.loc["2023-05-01":"2023-05-12", "ORMA"].notna().all()


def test_bad_tick_changes_exactly_one_close_by_the_multiplier() -> None:
    tick = Episode("bad_tick", date(2023, 6, 14), date(2023, 6, 14), symbols=("VSKR",),
                   tick_multiplier=0.1)
    clean = generate(group_scenario(())).closes
    faulty = generate(group_scenario((tick,))).closes
    changed = faulty.ne(clean).to_numpy()
    assert changed.sum() == 1
    assert faulty.loc["2023-06-14", "VSKR"] == pytest.approx(0.1 * clean.loc["2023-06-14", "VSKR"])
    moves = log_returns(faulty)["VSKR"].abs()
    # The spike out and back are the two largest moves; nothing else comes close.
    assert set(moves.nlargest(2).index) == {pd.Timestamp("2023-06-14"), pd.Timestamp("2023-06-15")}
    assert moves.nlargest(3).iloc[2] < 0.5 * math.log(10)


def test_bad_tick_on_a_holiday_is_rejected() -> None:
    tick = Episode("bad_tick", date(2023, 6, 14), date(2023, 6, 14), symbols=("VSKR",))
    with pytest.raises(ConfigError, match="not a trading day"):
        group_scenario((tick,), holidays=(date(2023, 6, 14),))


# -- calendar, listing, missing closes -------------------------------------------------


def test_holidays_have_no_close_for_anybody() -> None:
    holidays = (date(2022, 4, 15), date(2022, 12, 26), date(2023, 1, 2))
    out = generate(group_scenario((), holidays=holidays))
    index = out.closes.index
    assert not index.isin(pd.DatetimeIndex(holidays)).any()
    assert (index.day_of_week < 5).all()
    expected = pd.bdate_range("2022-01-03", "2023-12-29").difference(pd.DatetimeIndex(holidays))
    assert index.equals(pd.DatetimeIndex(expected, name="date"))
    rows = {d for d, _, _ in to_long_csv_rows(out.closes)}
    assert not rows & {h.isoformat() for h in holidays}


def test_missing_closes_appear_at_requested_rate_and_singly() -> None:
    rate = 0.02
    instruments = tuple(
        InstrumentSpec(f"TEZ{k:02d}", f"Tezar note {k}", "rates", loadings={"rates": 0.7})
        for k in range(20)
    )
    scenario = Scenario(instruments, ("rates",), date(2015, 1, 1), date(2022, 8, 31), seed=4,
                        missing_rate=rate)
    closes = generate(scenario).closes
    missing = closes.isna().to_numpy()[1:]  # the listing day always has its close
    cells = missing.size
    # A cell stays missing if drawn and its predecessor was not: probability p (1 - p).
    expected = rate * (1 - rate)
    sd = math.sqrt(expected * (1 - expected) / cells)  # binomial standard error
    assert abs(missing.mean() - expected) < 4 * sd
    assert not (missing[1:] & missing[:-1]).any()


def test_late_listing_has_no_close_before_first_date_and_opens_at_start_price() -> None:
    late = InstrumentSpec("MRBX", "Marrowbeck Retail", "equities", start_price=20.0,
                          loadings={"market": 0.5}, first_date=date(2023, 3, 6))
    base = group_scenario(())
    out = generate(replace(base, instruments=(*base.instruments, late)))
    mrbx = out.closes["MRBX"]
    assert mrbx.loc[:"2023-03-03"].isna().all()
    assert mrbx.loc["2023-03-06"] == pytest.approx(20.0, rel=1e-15)
    assert out.true_returns["MRBX"].loc[:"2023-03-06"].isna().all()
    assert out.true_returns["MRBX"].loc["2023-03-07":].notna().all()


def test_closes_are_positive_and_finite_where_present() -> None:
    closes = generate(demo_scenario(DEMO_START, DEMO_END)).closes.to_numpy()
    present = closes[~np.isnan(closes)]
    assert present.size > 0.95 * closes.size
    assert np.isfinite(present).all()
    assert (present > 0).all()


def test_to_long_csv_rows_lists_every_present_close_date_by_date() -> None:
    closes = generate(demo_scenario(DEMO_START, DEMO_END)).closes
    rows = list(to_long_csv_rows(closes))
    assert len(rows) == int(closes.notna().to_numpy().sum())
    assert [r[0] for r in rows] == sorted(r[0] for r in rows)
    back = pd.DataFrame(rows, columns=["date", "symbol", "close"]).pivot(
        index="date", columns="symbol", values="close"
    )
    back.index = pd.DatetimeIndex(back.index, name="date")
    back = back.reindex(index=closes.index, columns=closes.columns)
    np.testing.assert_array_equal(back.to_numpy(), closes.to_numpy())


# -- volatility clustering -------------------------------------------------------------


def test_garch_volatility_follows_its_recursion_and_clusters() -> None:
    garch = Garch(alpha=0.10, beta=0.85)
    instruments = tuple(
        InstrumentSpec(f"ORMA{k}", f"Orma Utilities line {k}", "equities", vol=0.01)
        for k in range(10)
    )
    scenario = Scenario(instruments, (), date(2004, 1, 1), date(2023, 6, 30), seed=21,
                        missing_rate=0.0, garch=garch)
    out = generate(scenario)
    h2 = (out.volatility / 0.01).to_numpy() ** 2
    z2 = shocks(out).to_numpy() ** 2
    recursion = (1 - 0.10 - 0.85) + h2[1:-1] * (0.10 * z2[1:-1] + 0.85)
    np.testing.assert_allclose(h2[2:], recursion, rtol=1e-12)
    squared = out.true_returns.to_numpy()[1:] ** 2
    lag1 = np.mean([np.corrcoef(s[1:], s[:-1])[0, 1] for s in squared.T])
    # Under no clustering the lag-1 autocorrelation of squared returns is 0 with SE about
    # 1/sqrt(T) (common practice); GARCH must push it far beyond that.
    assert lag1 > 4 / math.sqrt(len(squared))
    plain = generate(replace(scenario, garch=None))
    assert (plain.volatility == 0.01).to_numpy().all()


# -- the demo desk ---------------------------------------------------------------------


def test_demo_scenario_has_thirty_invented_instruments_in_five_groups() -> None:
    scenario = demo_scenario(DEMO_START, DEMO_END)
    assert len(scenario.instruments) == 30
    assert len({spec.symbol for spec in scenario.instruments}) == 30
    groups = {spec.group for spec in scenario.instruments}
    assert groups == {"equities", "rates", "commodities", "currencies", "credit"}
    assert {spec.currency for spec in scenario.instruments} <= {
        "KRD", "VLM", "OSN", "TZP", "PVL", "ZLF"
    }
    assert any(spec.first_date is not None for spec in scenario.instruments)
    assert scenario.holidays


def test_demo_episodes_cover_every_kind_near_the_end() -> None:
    scenario = demo_scenario(DEMO_START, DEMO_END)
    days = trading_days(scenario.start, scenario.end, scenario.holidays)
    last = days[-1]

    def back(d: date) -> int:
        return len(days) - 1 - int(days.get_loc(pd.Timestamp(d)))

    kinds = {e.kind for e in scenario.episodes}
    assert kinds == set(EPISODE_KINDS) - {"shift"}
    assert all(e.description for e in scenario.episodes)
    assert all(back(e.start) <= 390 for e in scenario.episodes)  # last ~18 months
    decouple = next(e for e in scenario.episodes if e.kind == "decouple")
    assert pd.Timestamp(decouple.end) == last and back(decouple.start) == 39
    assert set(decouple.symbols) in [set(p) for p in demo_hedge_pairs()]
    stress = next(e for e in scenario.episodes if e.kind == "stress")
    assert back(stress.end) <= 10
    assert any(back(e.end) > 100 for e in scenario.episodes)


def test_demo_hedge_pairs_are_demo_instruments_planted_to_move_together() -> None:
    scenario = demo_scenario(DEMO_START, DEMO_END)
    calm = planted_correlation(scenario, date(2022, 6, 1))
    for a, b in demo_hedge_pairs():
        assert calm.loc[a, b] > 0.4, (a, b)


def test_demo_decouple_and_stress_show_in_generated_data() -> None:
    scenario = demo_scenario(DEMO_START, DEMO_END)
    z = shocks(generate(scenario))
    decouple = next(e for e in scenario.episodes if e.kind == "decouple")
    calm = planted_correlation(scenario, date(2022, 6, 1))
    assert_near_correlation(*pair_corr(z.loc["2023-01-02":"2023-12-29"], "KLV", "DUNQ"),
                            rho=calm.loc["KLV", "DUNQ"])
    since = pd.Timestamp(decouple.start)
    assert_near_correlation(*pair_corr(z.loc[since:], "KLV", "DUNQ"), rho=0.0)
    stress = next(e for e in scenario.episodes if e.kind == "stress")
    credit = [s.symbol for s in scenario.instruments if s.group == "credit"]
    span = z.loc[pd.Timestamp(stress.start):pd.Timestamp(stress.end), credit].dropna()
    year = z.loc["2023-01-02":"2023-12-29", credit].dropna()
    upper = np.triu_indices(len(credit), 1)
    inside = np.corrcoef(span.to_numpy(), rowvar=False)[upper].mean()
    before = np.corrcoef(year.to_numpy(), rowvar=False)[upper].mean()
    assert inside > 0.8 > before + 0.2


def test_demo_scenario_rejects_a_range_too_short_for_its_episodes() -> None:
    with pytest.raises(ConfigError, match="demo range"):
        demo_scenario(date(2024, 1, 2), date(2024, 12, 31))


# -- input validation ------------------------------------------------------------------


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: InstrumentSpec("KLV", "K", "equities", loadings={"market": 1.1}), "KLV"),
        (lambda: InstrumentSpec("KLV", "K", "equities", vol=0.0), "vol"),
        (lambda: InstrumentSpec("KLV", "K", "equities", start_price=-1.0), "start_price"),
        (lambda: Episode("stress", date(2023, 2, 1), date(2023, 1, 1), group="equities"), "end"),
        (lambda: Episode("flip", date(2023, 1, 2), date(2023, 2, 1), symbols=("TEZ10",)),
         "factor"),
        (lambda: Episode("bad_tick", date(2023, 1, 2), date(2023, 1, 3), symbols=("KLV",)),
         "one day"),
        (lambda: Episode("stress", date(2023, 1, 2), date(2023, 2, 1), group="equities",
                         common_weight=1.0), "common_weight"),
        (lambda: Episode("surge", date(2023, 1, 2), date(2023, 2, 1), symbols=("KLV",)),  # type: ignore[arg-type]
         "kind"),
        (lambda: Garch(alpha=0.2, beta=0.85), "alpha \\+ beta"),
        (lambda: group_scenario((), missing_rate=0.7), "missing_rate"),
        (lambda: group_scenario((Episode("stale", date(2023, 1, 2), date(2023, 1, 6),
                                         symbols=("ZZZ",)),)), "ZZZ"),
        (lambda: group_scenario((Episode("stress", date(2023, 1, 2), date(2023, 1, 6),
                                         group="metals"),)), "metals"),
        (lambda: group_scenario((), end=date(2021, 1, 1)), "end"),
    ],
)
def test_bad_inputs_raise_config_error_naming_the_problem(
    build: Callable[[], object], message: str
) -> None:
    with pytest.raises(ConfigError, match=message):
        build()
