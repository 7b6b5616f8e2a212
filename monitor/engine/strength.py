"""Words for the strength and sign of a correlation, for the digest and the pages.

The default ladder is common practice with no single source, anchored on the words in
REFERENCES.md (about 0.9 "very strong", 0.5 "moderate", 0.1 "weak"); "strong" at 0.7
sits between the anchors. Correlation says how reliably two series move the same way, not
by how much and not why; the words describe that reliability only.

==========  ==============
 abs(r) >=  word
==========  ==============
 0.9        very strong
 0.7        strong
 0.5        moderate
 0.1        weak
 below      negligible
==========  ==============
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from monitor.errors import EngineInputError

UNDEFINED = "undefined"


@dataclass(frozen=True)
class StrengthLadder:
    """Thresholds on ``|r|``, highest first, each with its word; ``below`` for the rest.

    Raises EngineInputError unless the thresholds fall strictly and lie in (0, 1] and every word
    is non-empty.
    """

    steps: tuple[tuple[float, str], ...] = (
        (0.9, "very strong"),
        (0.7, "strong"),
        (0.5, "moderate"),
        (0.1, "weak"),
    )
    below: str = "negligible"

    def __post_init__(self) -> None:
        if not self.steps:
            raise EngineInputError("strength ladder needs at least one step")
        previous = math.inf
        for threshold, word in self.steps:
            if not isinstance(threshold, (int, float)) or not 0.0 < threshold <= 1.0:
                raise EngineInputError(f"strength threshold must be in (0, 1], got {threshold!r}")
            if threshold >= previous:
                raise EngineInputError(
                    f"strength thresholds must fall from the top, got {threshold} after {previous}"
                )
            if not isinstance(word, str) or not word.strip():
                raise EngineInputError(f"strength word for {threshold} must be non-empty text")
            previous = threshold
        if not self.below.strip():
            raise EngineInputError("strength word below the last threshold must be non-empty text")

    def word(self, r: float) -> str:
        """The word for ``|r|``; ``"undefined"`` for NaN."""
        if math.isnan(r):
            return UNDEFINED
        size = abs(r)
        for threshold, word in self.steps:
            if size >= threshold:
                return word
        return self.below


DEFAULT_LADDER = StrengthLadder()


def strength(r: float, ladder: StrengthLadder = DEFAULT_LADDER) -> str:
    """Strength word of a correlation, e.g. ``strength(-0.75) == "strong"``."""
    return ladder.word(float(r))


def direction(r: float) -> str:
    """``"positive"``, ``"negative"``, or ``"none"`` for zero and NaN."""
    value = float(r)
    if math.isnan(value) or value == 0.0:
        return "none"
    return "positive" if value > 0 else "negative"


def describe(r: float, ladder: StrengthLadder = DEFAULT_LADDER) -> str:
    """Strength and sign, e.g. ``"strong negative"``; the bottom word and NaN carry no sign."""
    word = strength(r, ladder)
    if word in (UNDEFINED, ladder.below) or direction(r) == "none":
        return word
    return f"{word} {direction(r)}"
