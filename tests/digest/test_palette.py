"""comove's palette (monitor/palette.py): the colours are the stated HSL steps, text is
readable on white, and nothing draws or writes with a colour from outside the palette."""

from __future__ import annotations

import colorsys
import re
from pathlib import Path

import pytest

from monitor import palette

REPO = Path(__file__).resolve().parents[2]
HEX = re.compile(r"#[0-9a-fA-F]{6}\b|#[0-9a-fA-F]{3}\b")


def relative_luminance(colour: str) -> float:
    """WCAG 2.x relative luminance of an sRGB colour (W3C, Web Content Accessibility
    Guidelines 2.1, definition of relative luminance)."""
    channels = [int(colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def contrast(a: str, b: str) -> float:
    """WCAG 2.x contrast ratio (L1 + 0.05) / (L2 + 0.05)."""
    high, low = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_contrast_formula_matches_the_published_extremes() -> None:
    # WCAG 2.1: black on white is 21:1, a colour against itself 1:1.
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert contrast("#777777", "#777777") == pytest.approx(1.0)


def test_slate_steps_are_the_stated_hsl_values() -> None:
    for step in palette.SLATE_STEPS:
        red, green, blue = colorsys.hls_to_rgb(palette.SLATE_HUE / 360, step / 100,
                                               palette.SLATE_SATURATION / 100)
        expected = "#" + bytes(round(c * 255) for c in (red, green, blue)).hex()
        assert palette.slate(step) == expected
    assert palette.hsl(0, 0, 100) == "#ffffff" and palette.hsl(0, 100, 50) == "#ff0000"
    with pytest.raises(ValueError, match="the steps are"):
        palette.slate(50)


def test_the_ramp_runs_dark_to_light_without_repeats() -> None:
    luminances = [relative_luminance(palette.slate(step)) for step in palette.SLATE_STEPS]
    assert luminances == sorted(luminances)
    assert len(set(palette.ALL_COLOURS.values())) == len(palette.ALL_COLOURS)


@pytest.mark.parametrize("name", sorted(palette.TEXT_COLOURS))
def test_every_text_colour_reads_on_white(name: str) -> None:
    # WCAG 2.1 success criterion 1.4.3: at least 4.5:1 for normal text.
    assert contrast(palette.TEXT_COLOURS[name], palette.PAPER) >= 4.5


def test_the_correlation_map_darkens_away_from_zero_on_both_sides() -> None:
    values = [relative_luminance(c) for c in palette.CORRELATION_STOPS]
    assert values[0] < values[1] < values[2] > values[3] > values[4]


def _files_with_colours() -> list[Path]:
    files = sorted(p for p in (REPO / "templates").rglob("*")
                   if p.is_file() and p.suffix in (".html", ".css", ".svg", ".js", ".txt"))
    files += sorted(p for p in (REPO / "monitor").rglob("*.py") if p.name != "palette.py")
    return files


def test_templates_style_sheet_and_charts_use_only_palette_colours() -> None:
    allowed = {colour.lower() for colour in palette.ALL_COLOURS.values()}
    strays = {
        f"{path.relative_to(REPO)}: {colour}"
        for path in _files_with_colours()
        for colour in HEX.findall(path.read_text(encoding="utf-8"))
        if colour.lower() not in allowed
    }
    assert strays == set()
