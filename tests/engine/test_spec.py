"""Measure specs: parsing, canonical text, and one-line errors naming what is wrong."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from monitor.engine import Measure, one_day, parse_measure, stream, tile
from monitor.engine.scaling import standardise
from monitor.errors import ConfigError, SpecError


def test_rolling_spec_parses_window_and_default_minimum() -> None:
    m = parse_measure("rolling:63")
    assert (m.kind, m.window, m.min_count, m.lam, m.mean) == ("rolling", 63, 63, None, None)
    assert m.text == "rolling:63"
    assert parse_measure(" rank : 21 , min = 15 ").text == "rank:21,min=15"


def test_ewma_spec_by_half_life_and_by_lambda() -> None:
    by_hl = parse_measure("ewma:hl=21")
    assert by_hl.lam == pytest.approx(0.5 ** (1 / 21), rel=1e-15)
    assert (by_hl.half_life, by_hl.mean, by_hl.min_count) == (21.0, "weighted", 21)
    by_lambda = parse_measure("ewma:lambda=0.94,mean=zero")
    assert by_lambda.lam == 0.94 and by_lambda.mean == "zero"
    assert by_lambda.half_life == pytest.approx(math.log(0.5) / math.log(0.94))
    assert by_lambda.min_count == 11
    assert by_lambda.text == "ewma:lambda=0.94,mean=zero"
    assert parse_measure("ewma:min=5,hl=2.5").text == "ewma:hl=2.5,min=5"


def test_default_ewma_minimum_stays_reachable_for_short_half_lives() -> None:
    # n_eff never reaches (1 + lambda) / (1 - lambda) = 3 for hl=1: the default must be below
    assert parse_measure("ewma:hl=1").min_count == 2
    assert parse_measure("ewma:hl=0.5").min_count == 1


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("corr:63", "unknown kind"),
        ("rolling", "kind:parameters"),
        ("rolling:2", "window must be >= 3, got 2"),
        ("rolling:abc", "whole number"),
        ("rolling:63,min=70", "min must be <= window 63, got 70"),
        ("rolling:63,min=1", "min must be >= 2"),
        ("rolling:63,span=4", "unknown option 'span'"),
        ("rank:63,min=5,min=6", "given twice"),
        ("rolling:min=5", "needs a window first"),
        ("ewma:hl=0", "hl must be > 0"),
        ("ewma:hl=-3", "hl must be > 0"),
        ("ewma:lambda=1", "lambda must be in (0, 1)"),
        ("ewma:lambda=0", "lambda must be in (0, 1)"),
        ("ewma:hl=10,lambda=0.9", "not both"),
        ("ewma:mean=zero", "needs hl="),
        ("ewma:hl=10,mean=median", "mean must be"),
        ("ewma:hl=10,min=40", "never reached"),
        ("ewma:hl=nan", "finite"),
        ("ewma:hl", "not key=value"),
    ],
)
def test_bad_specs_raise_one_line_spec_errors_naming_the_problem(text: str, fragment: str) -> None:
    with pytest.raises(SpecError) as info:
        parse_measure(text)
    message = str(info.value)
    assert fragment in message
    assert repr(text) in message
    assert "\n" not in message
    assert isinstance(info.value, ConfigError)


@given(
    st.one_of(
        st.builds(
            lambda kind, w, m: f"{kind}:{w}" + (f",min={min(m, w)}" if m else ""),
            st.sampled_from(["rolling", "rank"]),
            st.integers(3, 600),
            st.integers(0, 600).map(lambda m: m if m >= 2 else 0),
        ),
        st.builds(
            lambda hl, mean: f"ewma:hl={hl!r}" + ("" if mean is None else f",mean={mean}"),
            st.floats(0.6, 500, allow_nan=False),
            st.sampled_from([None, "weighted", "zero"]),
        ),
        st.builds(
            lambda lam, mean: f"ewma:lambda={lam!r}" + ("" if mean is None else f",mean={mean}"),
            st.floats(0.05, 0.999, allow_nan=False),
            st.sampled_from([None, "zero"]),
        ),
    )
)
def test_canonical_text_parses_back_to_the_same_measure(text: str) -> None:
    measure = parse_measure(text)
    again = parse_measure(measure.text)
    assert again == measure
    assert again.text == measure.text
    assert isinstance(again, Measure)


# --- scale=vol: measures on volatility-standardised returns ------------------------------


def test_scale_option_parses_and_is_spelled_last_in_the_canonical_text() -> None:
    assert parse_measure("rolling:63").scale == "none"
    scaled = parse_measure("rolling:63, scale = vol ,min=50")
    assert (scaled.scale, scaled.min_count) == ("vol", 50)
    assert scaled.text == "rolling:63,min=50,scale=vol"
    assert parse_measure("ewma:scale=vol,hl=21,mean=zero").text == "ewma:hl=21,mean=zero,scale=vol"
    assert parse_measure("rank:21,scale=none").text == "rank:21"
    assert parse_measure(scaled.text) == scaled
    assert parse_measure("rolling:63,scale=vol") != parse_measure("rolling:63")


def test_bad_scale_is_a_one_line_spec_error() -> None:
    with pytest.raises(SpecError, match=r"measure 'rolling:63,scale=log': scale must be 'none' "
                                        r"or 'vol', got 'log'"):
        parse_measure("rolling:63,scale=log")
    with pytest.raises(SpecError, match="given twice"):
        parse_measure("ewma:hl=5,scale=vol,scale=vol")


def _fat_tailed_returns(rows: int = 420, columns: int = 4, seed: int = 5) -> np.ndarray:
    rng = np.random.default_rng(seed)
    returns = rng.standard_t(4, size=(rows, columns)) * 0.01
    returns[:, 1] += 0.5 * returns[:, 0]
    gaps = rng.random(returns.shape) < 0.05
    gaps[100:] = False  # gaps early on; the later windows are complete
    returns[gaps] = np.nan
    return returns


@pytest.mark.parametrize("text", ["rolling:21,scale=vol", "rank:21,scale=vol",
                                  "ewma:hl=10,scale=vol", "ewma:hl=10,mean=zero,scale=vol"])
def test_scaled_measure_is_the_measure_of_the_standardised_returns(text: str) -> None:
    """The engine on scale=vol equals the plain measure run on standardise(returns)."""
    returns = _fat_tailed_returns()
    plain_text = text.replace(",scale=vol", "")
    scaled = list(stream(returns, text, pairs=[[0, 1], [2, 3]]))
    reference = list(stream(standardise(returns), plain_text, pairs=[[0, 1], [2, 3]]))
    values = np.array([d.value for d in scaled])
    np.testing.assert_array_equal(values, np.array([d.value for d in reference]))
    np.testing.assert_array_equal(np.array([d.n for d in scaled]),
                                  np.array([d.n for d in reference]))
    # Standardising needs 20 returns before a value, so the first rows have no measure.
    assert np.isnan(values[:21]).all() and np.isfinite(values[-100:]).all()
    plain = np.array([d.value for d in stream(returns, plain_text, pairs=[[0, 1], [2, 3]])])
    assert not np.allclose(plain[-100:], values[-100:])


def _same(actual: np.ndarray, expected: np.ndarray) -> None:
    np.testing.assert_allclose(actual, expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("text", ["rolling:21,scale=vol", "rank:21,scale=vol",
                                  "ewma:hl=10,scale=vol"])
def test_scaled_values_do_not_depend_on_where_the_computation_started(text: str) -> None:
    # The engine's contract: within 1e-12 of a full pass wherever it starts (DESIGN.md);
    # the standardised returns themselves are the same to the last bit.
    returns = _fat_tailed_returns()
    full = list(stream(returns, text))
    later = list(stream(returns, text, start=300))
    for k, day in enumerate(later):
        _same(day.value, full[300 + k].value)
    for t in (299, 350, len(returns) - 1):
        day = one_day(returns[: t + 1], text)
        _same(day.value, full[t].value)
        _same(one_day(returns, text, t, pairs=[[1, 2]]).value,
                                      full[t].value[[1], [2]])
        block = next(tile(returns, text, [0, 1], [2, 3], start=t, stop=t + 1))
        _same(block.value, full[t].value[:2, 2:])
    tiled = list(stream(returns, text, start=390, tile_size=3))
    for k, day in enumerate(tiled):
        _same(day.value, full[390 + k].value)
