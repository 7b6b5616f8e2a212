"""monitor.api: pandas in, pandas out, no store.

References: pandas ``Series.rolling(W, min_periods=M).corr`` and
``Series.ewm(halflife=H, adjust=True, ignore_na=False).corr`` (pandas 3.1) for the values,
``scipy.stats.pearsonr(...).confidence_interval`` for the Fisher bands (Fisher 1915, 1921),
``DataFrame.corr`` of the window for the matrix, plain numpy for the returns, and the
backfill (``monitor.pipeline.core.evaluate_range``) for the events. All data is simulated.
"""

from __future__ import annotations

import datetime as dt
import re
import subprocess
import sys
import tomllib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor import api
from monitor.alerts.book import AlertBook
from monitor.alerts.replay import make_plan, replay
from monitor.config import CorrelationSettings, ReturnsSettings, Settings
from monitor.demo.synthetic import generate, two_regime_pair
from monitor.errors import ConfigError, SpecError
from monitor.rules import build_rules
from tests.engine_reference import desk_returns
from tests.scenarios import INSTRUMENTS, RULES, break_scenario

REPO = Path(__file__).resolve().parents[1]
SYMBOLS = ["KLV", "ORMA", "TEZ10", "BRAND", "VOSK", "PELL", "NIRA"]


@pytest.fixture(scope="module")
def panel() -> pd.DataFrame:
    """Seeded returns with a late listing, scattered and block gaps and a flat stretch."""
    values = desk_returns(rows=260)
    return pd.DataFrame(values, index=pd.bdate_range("2024-01-01", periods=260),
                        columns=SYMBOLS)


def _wide(frame: pd.DataFrame, column: str) -> pd.DataFrame:
    """The long table's ``column`` as dates x pairs."""
    return frame.pivot(index="date", columns="pair", values=column)


# --- correlations ---------------------------------------------------------------------------


def _on_own_dates(panel: pd.DataFrame, a: str, b: str, compute: Callable[[pd.DataFrame],
                  pd.Series]) -> pd.Series:
    """Reference layout: ``compute`` on the pair's own dates (the rows where both have a
    return), laid back on every date, a date without both keeping the last own value."""
    both = panel[[a, b]].dropna()
    return compute(both).reindex(panel.index, method="ffill")


def test_rolling_correlations_match_pandas_rolling_corr_on_each_pairs_dates(
    panel: pd.DataFrame,
) -> None:
    """Reference: pandas Series.rolling(30, min_periods=20).corr(other) on the rows where
    both have a return, to 1e-10."""
    pairs = [("KLV", "ORMA"), ("KLV", "BRAND"), ("TEZ10", "NIRA"), ("ORMA", "PELL")]
    frame = api.correlations(panel, "rolling:30,min=20", pairs=pairs)
    assert len(frame) == len(panel) * len(pairs)
    values = _wide(frame, "value")
    for a, b in pairs:
        with np.errstate(invalid="ignore", divide="ignore"):
            expected = _on_own_dates(panel, a, b, lambda both, a=a, b=b: both[a].rolling(
                30, min_periods=20).corr(both[b]))
        got = values[f"{a}/{b}"]
        assert np.array_equal(got.isna().to_numpy(), expected.isna().to_numpy()), (a, b)
        assert np.nanmax(np.abs(got - expected)) <= 1e-10
        assert got.notna().sum() > 100
    counts = _wide(frame, "n")["KLV/BRAND"]
    common = _on_own_dates(panel, "KLV", "BRAND",
                           lambda both: both["KLV"].rolling(30, min_periods=1).count())
    np.testing.assert_array_equal(counts.to_numpy(), common.fillna(0.0).to_numpy())


@pytest.mark.parametrize("half_life", [5.0, 21.0])
def test_ewma_correlations_match_pandas_ewm_corr_on_each_pairs_dates(
    panel: pd.DataFrame, half_life: float
) -> None:
    """Reference: pandas Series.ewm(halflife=H, adjust=True).corr(other) on the rows where
    both have a return."""
    pairs = ["KLV/ORMA", "BRAND/PELL", "TEZ10/NIRA"]
    frame = api.correlations(panel, f"ewma:hl={half_life:g},min=1", pairs=pairs)
    values = _wide(frame, "value")
    for text in pairs:
        a, b = text.split("/")
        with np.errstate(invalid="ignore", divide="ignore"):
            expected = _on_own_dates(panel, a, b, lambda both, a=a, b=b: both[a].ewm(
                halflife=half_life, adjust=True).corr(both[b]))
        got = values[text]
        both = got.notna() & expected.notna()
        assert both.sum() > 200
        assert np.max(np.abs(got[both] - expected[both])) <= 1e-10
        assert np.array_equal(got.isna().to_numpy(), expected.isna().to_numpy()), text


def test_bands_match_scipy_pearsonr_confidence_interval(panel: pd.DataFrame) -> None:
    """Reference: scipy.stats.pearsonr(x, y).confidence_interval(0.9), Fisher z with n - 3."""
    frame = api.correlations(panel, "rolling:30,min=20", pairs=["KLV/BRAND", "ORMA/NIRA"],
                             level=0.9)
    rows = frame.set_index(["date", "pair"])
    checked = 0
    for date in panel.index[[45, 120, 180, 259]]:
        for text in ("KLV/BRAND", "ORMA/NIRA"):
            a, b = text.split("/")
            both = panel.loc[:date, [a, b]].dropna().iloc[-30:]  # the pair's last 30 dates
            row = rows.loc[(date, text)]
            if len(both) < 20:
                assert np.isnan(row["value"])
                continue
            result = stats.pearsonr(both[a], both[b])
            interval = result.confidence_interval(confidence_level=0.9)
            assert row["n"] == len(both)
            assert row["value"] == pytest.approx(result.statistic, abs=1e-12)
            assert row["low"] == pytest.approx(interval.low, abs=1e-10)
            assert row["high"] == pytest.approx(interval.high, abs=1e-10)
            checked += 1
    assert checked >= 6


def test_every_pair_by_default_equals_the_listed_pairs(panel: pd.DataFrame) -> None:
    """pairs=None takes the engine's matrix path; it must give the pair-list path's values."""
    everything = api.correlations(panel, "rank:25,min=15")
    assert len(everything) == len(panel) * 21
    assert list(everything["pair"].iloc[:3]) == ["KLV/ORMA", "KLV/TEZ10", "KLV/BRAND"]
    listed = ["NIRA/KLV", ("PELL", "VOSK")]
    some = api.correlations(panel, "rank:25,min=15", pairs=listed)
    assert list(some["pair"].iloc[:2]) == ["NIRA/KLV", "PELL/VOSK"]
    wide_all = _wide(everything, "value")
    wide_some = _wide(some, "value")
    np.testing.assert_allclose(wide_some["NIRA/KLV"], wide_all["KLV/NIRA"], atol=1e-12)
    np.testing.assert_allclose(wide_some["PELL/VOSK"], wide_all["VOSK/PELL"], atol=1e-12)
    flat = _wide(everything, "stale")["KLV/VOSK"]
    assert flat.any() and not _wide(everything, "stale")["KLV/ORMA"].any()


def test_start_and_end_keep_a_range_without_changing_its_values(panel: pd.DataFrame) -> None:
    full = api.correlations(panel, "ewma:hl=10", pairs=["KLV/ORMA"])
    part = api.correlations(panel, "ewma:hl=10", pairs=["KLV/ORMA"], start="2024-05-01",
                            end=dt.date(2024, 6, 28))
    assert part["date"].iloc[0] == pd.Timestamp("2024-05-01")
    assert part["date"].iloc[-1] == pd.Timestamp("2024-06-28")
    expected = full.set_index("date").loc["2024-05-01":"2024-06-28", "value"]
    np.testing.assert_allclose(part["value"].to_numpy(), expected.to_numpy(), atol=1e-12)


def test_a_date_object_index_comes_back_as_date_objects(panel: pd.DataFrame) -> None:
    dated = panel.set_axis([d.date() for d in panel.index], axis=0)
    frame = api.correlations(dated, "rolling:30", pairs=["KLV/ORMA"])
    assert frame["date"].iloc[-1] == dt.date(2024, 12, 27)
    assert isinstance(frame["date"].iloc[0], dt.date)
    on = api.matrix(dated, "rolling:30", on=dt.date(2024, 6, 3))
    assert on.loc["KLV", "ORMA"] == pytest.approx(
        frame.set_index("date").loc[dt.date(2024, 6, 3), "value"], abs=1e-12)


# --- matrix ---------------------------------------------------------------------------------


@pytest.mark.parametrize("row", [150, 259])
def test_matrix_matches_dataframe_corr_of_each_pairs_window(panel: pd.DataFrame,
                                                             row: int) -> None:
    """Reference: DataFrame.corr(min_periods=20) of each pair's last 30 own dates."""
    on = panel.index[row]
    got = api.matrix(panel, "rolling:30,min=20", on=on if row != 259 else None)
    assert list(got.index) == SYMBOLS and list(got.columns) == SYMBOLS
    checked = 0
    for i, a in enumerate(SYMBOLS):
        for b in SYMBOLS[i + 1:]:
            window = panel.loc[:on, [a, b]].dropna().iloc[-30:]
            with np.errstate(invalid="ignore", divide="ignore"):
                expected = window.corr(min_periods=20).loc[a, b]
            assert got.loc[a, b] == got.loc[b, a] or np.isnan(got.loc[a, b])
            if np.isnan(expected):
                assert np.isnan(got.loc[a, b]), (a, b)
            else:
                assert got.loc[a, b] == pytest.approx(expected, abs=1e-10), (a, b)
                checked += 1
    assert checked >= 10


def test_matrix_of_an_ewma_matches_pandas_ewm_corr_on_that_date(panel: pd.DataFrame) -> None:
    """Reference: DataFrame.ewm(halflife=21, adjust=True).corr() on each pair's own dates."""
    on = panel.index[200]
    got = api.matrix(panel, "ewma:hl=21,min=1", on=str(on.date()))
    checked = 0
    for i, a in enumerate(SYMBOLS):
        for b in SYMBOLS[i + 1:]:
            both = panel.loc[:on, [a, b]].dropna()
            with np.errstate(invalid="ignore", divide="ignore"):
                expected = both[a].ewm(halflife=21, adjust=True).corr(both[b]).iloc[-1]
            if np.isfinite(expected) and np.isfinite(got.loc[a, b]):
                assert got.loc[a, b] == pytest.approx(expected, abs=1e-10), (a, b)
                checked += 1
    assert checked >= 15


# --- returns --------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def closes() -> pd.DataFrame:
    rng = np.random.default_rng(41)
    values = 50.0 * np.exp(np.cumsum(rng.normal(0.0, 0.01, (40, 3)), axis=0))
    values[[5, 6, 20], 0] = np.nan
    values[:3, 2] = np.nan
    return pd.DataFrame(values, index=pd.bdate_range("2025-03-03", periods=40),
                        columns=["KLV", "DUNQ", "ORMA"])


def _previous_close_rows(c: np.ndarray) -> np.ndarray:
    """Plain loop: the row of each column's previous close before each row (-1: none)."""
    prev = np.full(c.shape, -1)
    for j in range(c.shape[1]):
        last = -1
        for t in range(c.shape[0]):
            prev[t, j] = last
            if not np.isnan(c[t, j]):
                last = t
    return prev


def test_returns_match_a_direct_numpy_computation(closes: pd.DataFrame) -> None:
    c = closes.to_numpy()
    prev = _previous_close_rows(c)
    before = np.where(prev >= 0, c[np.maximum(prev, 0), np.arange(c.shape[1])], np.nan)
    log = api.returns(closes)
    assert log.index.equals(closes.index[1:]) and list(log.columns) == list(closes.columns)
    np.testing.assert_allclose(log.to_numpy(), np.log(c / before)[1:], rtol=1e-15, atol=0,
                               equal_nan=True)
    # no close on rows 5, 6 and 20: those returns are missing, the next ones span the gap
    assert np.isnan(log["KLV"].iloc[[4, 5, 19]]).all()
    assert log["KLV"].iloc[6] == pytest.approx(np.log(c[7, 0] / c[4, 0]), rel=1e-15)
    simple = api.returns(closes, kind="simple")
    np.testing.assert_allclose(simple.to_numpy(), (c / before - 1)[1:], rtol=1e-15, atol=0,
                               equal_nan=True)
    # five-day returns counted back from the last row: rows 39, 34, ..., 4
    rows = np.arange(39, -1, -5)[::-1]
    five = api.returns(closes, horizon=5)
    assert five.index.equals(closes.index[rows[1:]])
    np.testing.assert_allclose(five.to_numpy(), np.log(c[rows[1:]] / c[rows[:-1]]),
                               equal_nan=True)
    # one carried close bridges the single gap (row 20) with a zero return
    filled = api.returns(closes, fill_limit=1)
    assert filled["KLV"].iloc[19] == pytest.approx(0.0, abs=0)
    assert filled["KLV"].iloc[20] == pytest.approx(np.log(c[21, 0] / c[19, 0]), rel=1e-15)
    assert np.isnan(filled["KLV"].iloc[5])
    assert filled["KLV"].iloc[6] == pytest.approx(np.log(c[7, 0] / c[4, 0]), rel=1e-15)
    # beyond max_gap business days the return is missing
    assert np.isnan(api.returns(closes, max_gap=2)["KLV"].iloc[6])
    with pytest.raises(ConfigError, match="returns: max_gap"):
        api.returns(closes, max_gap=0)


def test_the_api_defaults_are_the_settings_defaults() -> None:
    assert api.DEFAULT_MEASURE == CorrelationSettings().default_measure
    defaults = ReturnsSettings()
    assert (defaults.kind, defaults.horizon, defaults.fill_limit) == ("log", 1, 0)
    assert defaults.max_gap == api.DEFAULT_MAX_GAP == 5
    assert CorrelationSettings().level == 0.95


# --- evaluate -------------------------------------------------------------------------------

BREAK_RULE = {"name": "hedge-break", "kind": "level", "measure": "rolling:21",
              "pairs": ["KLV/ORMA"], "below": 0.3, "clear": 0.45, "hold": 3,
              "severity": "critical"}


def test_evaluate_opens_on_a_planted_break_when_pandas_says_it_should() -> None:
    """The opening day is the first of three days running on which pandas'
    rolling(21).corr is below 0.3 (independent reference of the level rule)."""
    change_day = 300
    world = two_regime_pair(seed=3, n_days=500, rho_before=0.9, rho_after=0.0,
                            change_day=change_day)
    returns = api.returns(world.closes)
    events = api.evaluate(returns, [BREAK_RULE])
    assert list(events.columns) == list(api.EVENT_COLUMNS)
    opened = events[events["event"] == "opened"]
    assert len(opened) >= 1
    first = opened.iloc[0]
    change = world.closes.index[change_day]
    assert (events["date"] >= change).all()  # nothing before the break (r about 0.9)
    # a 21-day window and a hold of 3: seen within 21 + 3 business days of the change
    assert len(returns.loc[change:first["date"]]) <= 24
    corr = returns["KLV"].rolling(21).corr(returns["ORMA"])
    below = (corr < 0.3).astype(int)
    streak = below.groupby((below == 0).cumsum()).cumsum()
    assert first["date"] == streak[streak >= 3].index[0]
    assert first["value"] == pytest.approx(corr.loc[first["date"]], abs=1e-10)
    assert first["target"] == "KLV/ORMA" and first["severity"] == "critical"
    assert first["symbols"] == ("KLV", "ORMA") and first["level"] == 0.3
    assert first["low"] < first["value"] < first["high"] and first["n"] == 21
    assert first["first_breach"] < first["date"] and first["days_held"] == 3
    assert events["date"].is_monotonic_increasing


def test_evaluate_gives_the_events_of_a_direct_replay(panel: pd.DataFrame) -> None:
    """The same rules through build_rules, make_plan, replay and a fresh AlertBook."""
    rules = [
        {"name": "tight", "kind": "level", "measure": "rolling:30,min=20", "group": "core",
         "above": 0.55, "clear": 0.45, "remind_every": 4},
        {"name": "swing", "kind": "jump", "measure": "ewma:hl=10", "all": True, "delta": 0.3,
         "over_days": 5},
    ]
    groups = {"KLV": "core", "ORMA": "core", "PELL": "core", "BRAND": "other"}
    events = api.evaluate(panel, rules, groups)
    built = build_rules(rules, symbols=SYMBOLS, groups={"core": ["KLV", "ORMA", "PELL"],
                                                        "other": ["BRAND"]},
                        default_measure="rolling:63")
    plan = make_plan(built, SYMBOLS, level=0.95)
    dates = [d.date() for d in panel.index]
    direct = [e for day in replay(panel.to_numpy(), dates, plan, AlertBook())
              for e in day.events]
    assert {"opened", "cleared", "continuing"} <= set(events["event"])
    assert len(events) == len(direct)
    for (_, row), e in zip(events.iterrows(), direct, strict=True):
        assert (row["date"].date(), row["rule"], row["target"], row["event"]) == (
            e.date, e.rule, e.target, e.event)
        assert row["opened"].date() == e.opened and row["days_held"] == e.days_held
        np.testing.assert_array_equal([row["value"], row["low"], row["high"], row["n"]],
                                      [e.value, e.low, e.high, e.n])


def test_evaluate_gives_the_events_the_backfill_stores(
    store_url: str, write_settings: Callable[..., Settings], tmp_path: Path
) -> None:
    """The backfill of tests/pipeline/test_backfill.py and api.evaluate on the same closes."""
    from monitor.pipeline import evaluate_range, ingest_file, init_store
    from storage import alerts as alerts_store

    closes = generate(break_scenario()).closes
    closes.index.name = "date"
    path = tmp_path / "closes.csv"
    closes.to_csv(path, date_format="%Y-%m-%d")
    settings = write_settings(store_url, INSTRUMENTS + RULES)
    store = init_store(settings)
    try:
        ingest_file(store, settings, path, today=dt.date(2024, 1, 5))
        evaluate_range(store, settings, None, None)
        with store.connect() as conn:
            alerts = {a.id: a for a in alerts_store.list_alerts(conn)}
            stored = sorted(
                (alerts[e["alert_id"]].rule, alerts[e["alert_id"]].target, e["date"],
                 e["event"], round(e["value"], 11), round(e["n"], 11), e["days_held"])
                for e in alerts_store.events_for(conn))
    finally:
        store.dispose()
    read_back = pd.read_csv(path, index_col="date", parse_dates=True)
    groups = {"KLV": "equities", "DUNQ": "equities", "TEZ10": "rates"}
    events = api.evaluate(api.returns(read_back), tomllib.loads(RULES)["rules"], groups)
    mine = sorted((r.rule, r.target, r.date.date(), r.event, round(r.value, 11),
                   round(r.n, 11), r.days_held) for r in events.itertuples())
    assert any(row[3] == "opened" for row in mine)
    assert mine == stored


def test_stale_rules_read_the_closes(closes: pd.DataFrame) -> None:
    flat = closes.copy()
    flat.iloc[10:16, 1] = flat.iloc[9, 1]  # DUNQ's close does not change for six days
    rule = {"name": "frozen", "kind": "stale", "symbols": ["DUNQ"], "after_days": 4}
    returns = api.returns(flat)
    with pytest.raises(ConfigError, match=r"^evaluate: closes: rule 'frozen' is a stale rule"):
        api.evaluate(returns, [rule])
    events = api.evaluate(returns, rule, closes=flat)
    assert list(events["event"]) == ["opened", "cleared"]
    assert events["date"].iloc[0] == flat.index[13]  # the fourth unchanged day
    assert events["date"].iloc[1] == flat.index[16]  # the first new close
    assert events["target"].iloc[0] == "DUNQ"


def test_no_rule_fires_gives_an_empty_table_with_the_columns(panel: pd.DataFrame) -> None:
    events = api.evaluate(panel, [{"name": "never", "kind": "level", "pairs": ["KLV/ORMA"],
                                   "measure": "rolling:30", "below": -0.99}])
    assert events.empty and list(events.columns) == list(api.EVENT_COLUMNS)


# --- bad input ------------------------------------------------------------------------------


def _error(call: Callable[[], object]) -> str:
    with pytest.raises(ConfigError) as info:
        call()
    message = str(info.value)
    assert "\n" not in message
    return message


def test_bad_panels_are_refused_naming_the_argument_and_the_value(
    panel: pd.DataFrame, closes: pd.DataFrame
) -> None:
    assert _error(lambda: api.correlations(panel.to_numpy())) == (
        "correlations: returns: expected a pandas DataFrame (dates x symbols), got ndarray")
    texts = panel.set_axis([str(d.date()) for d in panel.index], axis=0)
    assert "'2024-01-01'" in _error(lambda: api.matrix(texts))
    backwards = panel.iloc[::-1]
    assert "not ascending" in _error(lambda: api.correlations(backwards))
    twice = pd.concat([panel.iloc[:5], panel.iloc[4:6]])
    assert "repeated date 2024-01-05" in _error(lambda: api.evaluate(twice, []))
    timed = panel.set_axis(panel.index + pd.Timedelta(hours=17), axis=0)
    assert "time of day" in _error(lambda: api.correlations(timed))
    words = panel.assign(ORMA="x")
    assert "column 'ORMA'" in _error(lambda: api.correlations(words))
    numbered = panel.set_axis(range(7), axis=1)
    assert "column 0 is not a symbol" in _error(lambda: api.matrix(numbered))
    infinite = panel.copy()
    infinite.iloc[7, 3] = np.inf
    assert "BRAND on 2024-01-10 is inf" in _error(lambda: api.correlations(infinite))
    negative = closes.copy()
    negative.iloc[2, 1] = -1.0
    message = _error(lambda: api.returns(negative))
    assert message == "returns: closes: DUNQ on 2025-03-05 is -1.0; a close must be > 0"


def test_bad_arguments_are_refused_naming_the_argument_and_the_value(
    panel: pd.DataFrame, closes: pd.DataFrame
) -> None:
    assert _error(lambda: api.returns(closes, kind="lgo")) == (
        "returns: kind: 'lgo' is not one of 'log', 'simple'")
    assert "horizon: expected a whole number >= 1, got 0" in _error(
        lambda: api.returns(closes, horizon=0))
    message = _error(lambda: api.correlations(panel, pairs=["KLV/QQX", ("ZED", "ORMA")]))
    assert message.startswith("correlations: pairs: unknown symbol 'QQX', 'ZED' (columns: ")
    assert "pairs an instrument with itself" in _error(
        lambda: api.correlations(panel, pairs=["KLV/KLV"]))
    assert "'KLV-ORMA' is not a pair" in _error(
        lambda: api.correlations(panel, pairs=["KLV-ORMA"]))
    with pytest.raises(SpecError, match=r"^correlations: measure: measure 'rolling:2'"):
        api.correlations(panel, "rolling:2")
    assert _error(lambda: api.correlations(panel, level=1.5)) == (
        "correlations: level: expected a number in (0, 1), got 1.5")
    assert _error(lambda: api.matrix(panel, on="2024-01-06")) == (
        "matrix: on: '2024-01-06' is not a date of the returns (2024-01-01 to 2024-12-27)")
    assert "'soon' is not a date" in _error(lambda: api.correlations(panel, start="soon"))
    assert _error(lambda: api.evaluate(panel, [BREAK_RULE], {"QQX": "core"})).startswith(
        "evaluate: groups: unknown symbol 'QQX'")
    with pytest.raises(SpecError, match=r"^evaluate: default_measure: measure 'ewma:hl=0'"):
        api.evaluate(panel, [BREAK_RULE], default_measure="ewma:hl=0")
    typo = dict(BREAK_RULE, hold_days=3)
    assert _error(lambda: api.evaluate(panel, [typo])).startswith(
        "rules[0] (hedge-break).hold_days:")


# --- import and the README ------------------------------------------------------------------


def test_from_monitor_import_api_works_and_import_monitor_stays_light() -> None:
    code = (
        "import sys\n"
        "import monitor\n"
        "assert 'pandas' not in sys.modules and 'monitor.api' not in sys.modules\n"
        "from monitor import api\n"
        "print(sorted(api.__all__))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=REPO, timeout=60)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "['correlations', 'evaluate', 'matrix', 'returns']"


def _readme_example() -> str:
    text = (REPO / "README.md").read_text(encoding="utf-8")
    section = re.search(r"^## Use from Python\n(.*?)(?=^## |\Z)", text, flags=re.S | re.M)
    assert section is not None, "README.md has no '## Use from Python' section"
    block = re.search(r"^```python\n(.*?)^```", section.group(1), flags=re.S | re.M)
    assert block is not None, "'## Use from Python' in README.md has no ```python block"
    return block.group(1)


def test_the_readme_example_runs_and_finds_the_planted_break() -> None:
    code = _readme_example()
    assert "from monitor import api" in code
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=REPO, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "KLV/DUNQ" in done.stdout and "opened" in done.stdout
