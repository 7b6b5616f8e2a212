"""How an alert's numbers read: each with its unit, because one listing mixes rule kinds
(a correlation, a z threshold, a number of days, a CUSUM evidence).

Pure text formatting for the command line's tables; the stored numbers stay plain floats
(CSV and JSON keep them, with the rule kind beside them).
"""

from __future__ import annotations

import math

EMPTY = "-"
"""What a table shows for a number that is not there (never 'None' or 'nan')."""

_VALUE_UNIT = {"level": "corr", "basket": "corr", "group-average": "corr", "sign": "corr",
               "shift": "corr", "jump": "corr", "cusum": "corr", "stale": "days",
               "hedge": "ratio"}
"""The unit of an alert's value and peak, by rule kind."""

_THRESHOLD_UNIT = {"level": "corr", "basket": "corr", "group-average": "corr", "sign": "sign",
                   "shift": "|z|", "jump": "change", "cusum": "evidence", "stale": "days"}
"""The unit of the threshold a rule kind opens at: a correlation level, the sign change
(0), a |z| threshold, a change in correlation, a CUSUM evidence boundary, a count of days."""


def _missing(number: float | None) -> bool:
    return number is None or (isinstance(number, float) and math.isnan(number))


def _days(number: float) -> str:
    return "1 day" if number == 1 else f"{number:,.0f} days"


def with_unit(unit: str, number: float | None) -> str:
    """One number written with its unit: '+0.300 corr', '|z| 4.29', '3 days'."""
    if _missing(number):
        return EMPTY
    assert number is not None
    if unit == "corr":
        return f"{number:+.3f} corr"
    if unit == "days":
        return _days(number)
    if unit == "|z|":
        return f"|z| {abs(number):.2f}"
    if unit == "change":
        return f"change {abs(number):.3f} corr"
    if unit == "evidence":
        return f"evidence {number:.2f}"
    if unit == "sign":
        return "sign change"
    if unit == "ratio":
        return f"ratio {number:+.3f}"
    return f"{number:g}"


def value_text(kind: str, number: float | None) -> str:
    """An alert's value or peak with its unit."""
    return with_unit(_VALUE_UNIT.get(kind, ""), number)


def threshold_text(kind: str, number: float | None) -> str:
    """The threshold a rule of this kind opens at, with its unit."""
    return with_unit(_THRESHOLD_UNIT.get(kind, ""), number)
