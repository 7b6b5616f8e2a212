"""Measure specs: parsing, canonical text, and one-line errors naming what is wrong."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from monitor.engine import Measure, parse_measure
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
