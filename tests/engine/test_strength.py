"""Strength words (common practice ladder anchored on REFERENCES.md)."""

from __future__ import annotations

import pytest

from monitor.engine import DEFAULT_LADDER, StrengthLadder, describe, direction, strength
from monitor.errors import EngineInputError


@pytest.mark.parametrize(
    ("r", "word"),
    [
        (0.95, "very strong"),
        (0.9, "very strong"),
        (-0.75, "strong"),
        (0.5, "moderate"),
        (-0.3, "weak"),
        (0.1, "weak"),
        (0.05, "negligible"),
        (float("nan"), "undefined"),
    ],
)
def test_default_ladder_words(r: float, word: str) -> None:
    """Common practice: about 0.9 very strong, 0.5 moderate, 0.1 weak (REFERENCES.md)."""
    assert strength(r) == word


def test_describe_adds_the_sign_except_for_negligible_and_undefined() -> None:
    assert describe(-0.82) == "strong negative"
    assert describe(0.55) == "moderate positive"
    assert describe(0.02) == "negligible"
    assert describe(float("nan")) == "undefined"
    assert (direction(0.2), direction(-0.2), direction(0.0)) == ("positive", "negative", "none")


def test_a_desk_can_set_its_own_ladder() -> None:
    ladder = StrengthLadder(steps=((0.8, "tight"), (0.4, "loose")), below="unrelated")
    assert [strength(r, ladder) for r in (0.85, -0.5, 0.1)] == ["tight", "loose", "unrelated"]
    assert DEFAULT_LADDER.word(0.85) == "strong"


@pytest.mark.parametrize(
    "steps",
    [(), ((0.5, "a"), (0.7, "b")), ((1.5, "a"),), ((0.5, " "),), ((0.0, "a"),)],
)
def test_bad_ladders_are_config_errors(steps: tuple[tuple[float, str], ...]) -> None:
    with pytest.raises(EngineInputError, match="strength"):
        StrengthLadder(steps=steps)
