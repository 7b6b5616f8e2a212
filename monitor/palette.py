"""comove's colours: one slate ramp and a few accents, every step chosen here.

What it is: colours written as HSL (hue in degrees, saturation and lightness in percent,
turned into sRGB by Python's :func:`colorsys.hls_to_rgb`) at steps picked for this program,
not taken from any published colour ramp.

* The slate ramp is hue 214, saturation 14 %, at the lightness steps in
  :data:`SLATE_STEPS`: dark steps for text and lines, light ones for rules and shading.
* Accents: clay (hue 16) for critical alerts and for positive correlations, ochre (hue 38)
  for warnings, a deep blue (hue 206) for links, and a pale clay for alert spans.
* The correlation map runs from deep slate blue (-1) through a near-white slate (0) to deep
  clay (+1), so the sign still reads in greyscale print (darker = stronger).

Severity and state are always written as words; colour only repeats them. Every colour
used for text has a contrast ratio of at least 4.5 against white by the WCAG 2 formula
(checked in tests/digest/test_palette.py), and every colour in the templates, the style
sheet and the chart modules is one of these (the same test).
"""

from __future__ import annotations

import colorsys

SLATE_HUE = 214
SLATE_SATURATION = 14
SLATE_STEPS: tuple[int, ...] = (14, 24, 33, 40, 52, 64, 78, 88, 94, 98)
"""Lightness (percent) of each slate step, dark to light."""


def hsl(hue: float, saturation: float, lightness: float) -> str:
    """``#rrggbb`` of an HSL colour (hue in degrees, saturation and lightness in percent)."""
    red, green, blue = colorsys.hls_to_rgb(hue / 360.0, lightness / 100.0, saturation / 100.0)
    return "#" + "".join(f"{round(channel * 255):02x}" for channel in (red, green, blue))


def slate(lightness: int) -> str:
    """One step of the slate ramp (one of :data:`SLATE_STEPS`)."""
    if lightness not in SLATE_STEPS:
        raise ValueError(f"slate({lightness}): the steps are {SLATE_STEPS}")
    return hsl(SLATE_HUE, SLATE_SATURATION, lightness)


PAPER = "#ffffff"
INK = slate(14)
"""Body text, headings, the favicon's tile."""
LINE = slate(24)
"""A chart's value line."""
INFO = slate(33)
"""Severity word `info`; the level a chart clears at."""
MUTED = slate(40)
"""Secondary text: names beside codes, notes, chart ticks."""
START = slate(52)
"""The vertical line on an alert's first day."""
TABLE_RULE = slate(64)
"""The rule under a table's header row."""
BAND = slate(78)
"""A confidence band's shading; the favicon's second line."""
GRID = slate(88)
"""Grid lines and the rules between table rows."""
SHADE = slate(94)
"""A table header's background."""
ZERO = slate(98)
"""The correlation map at zero."""

CRITICAL = hsl(16, 80, 29)
"""Severity word `critical`; a chart's level line; the attention box."""
WARNING = hsl(38, 100, 24)
"""Severity word `warning`; the notice bar."""
LINK = hsl(206, 62, 32)
"""Links and focus outlines."""
SPAN = hsl(26, 56, 79)
"""An alert's span on a history chart; the favicon's first line."""
NOTICE = hsl(38, 70, 95)
"""The background of a notice."""

NEGATIVE_DEEP = hsl(214, 50, 22)
NEGATIVE_MID = hsl(214, 34, 62)
POSITIVE_MID = hsl(22, 52, 64)
POSITIVE_DEEP = hsl(16, 72, 27)
CORRELATION_STOPS: tuple[str, ...] = (NEGATIVE_DEEP, NEGATIVE_MID, ZERO, POSITIVE_MID,
                                      POSITIVE_DEEP)
"""The correlation map's colours at -1, -0.5, 0, +0.5 and +1."""

TEXT_COLOURS: dict[str, str] = {
    "INK": INK, "LINE": LINE, "INFO": INFO, "MUTED": MUTED, "CRITICAL": CRITICAL,
    "WARNING": WARNING, "LINK": LINK,
}
"""The colours written as text on white (each at least 4.5:1)."""

ALL_COLOURS: dict[str, str] = {
    "PAPER": PAPER, **TEXT_COLOURS, "START": START, "TABLE_RULE": TABLE_RULE, "BAND": BAND,
    "GRID": GRID, "SHADE": SHADE, "ZERO": ZERO, "SPAN": SPAN, "NOTICE": NOTICE,
    "NEGATIVE_DEEP": NEGATIVE_DEEP, "NEGATIVE_MID": NEGATIVE_MID,
    "POSITIVE_MID": POSITIVE_MID, "POSITIVE_DEEP": POSITIVE_DEEP,
}
"""Every colour comove draws or writes with, by name."""
