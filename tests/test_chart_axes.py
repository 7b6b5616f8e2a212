"""The shared chart axes (monitor.chart_axes): value range fitted to the data and the level,
and date ticks that read at any span, in the digest's PNG and the pages' SVG charts alike."""

from __future__ import annotations

import math
import re
import xml.etree.ElementTree as ET
from datetime import date, timedelta

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from monitor import chart_axes
from monitor.digest import png_charts
from monitor.pages import svg_charts


def _days(n: int, first: date = date(2025, 1, 2)) -> list[date]:
    return [first + timedelta(days=k) for k in range(n)]


def _high_pair(n: int = 250) -> tuple[list[date], np.ndarray, np.ndarray, np.ndarray]:
    """A pair living between 0.8 and 0.95 (a bond future and its neighbour, say)."""
    rng = np.random.default_rng(7)
    values = 0.875 + 0.07 * np.sin(np.linspace(0, 6, n)) + rng.normal(0, 0.002, n)
    return _days(n), values, values - 0.03, np.minimum(values + 0.03, 1.0)


# --- value range -----------------------------------------------------------------------


def test_value_range_fits_the_data_and_keeps_the_level_in_view() -> None:
    _, values, low, high = _high_pair()
    bottom, top = chart_axes.value_limits((values, low, high), (0.7, None))
    assert 0.6 < bottom < 0.7
    assert float(np.max(high)) <= top <= 1.05
    # Data and level fill all but the margins (on -1..1 they filled 14 % of the height).
    assert (np.max(high) - 0.7) / (top - bottom) > 0.9


def test_value_range_never_passes_the_bounds_of_a_correlation_by_more_than_the_margin() -> None:
    bottom, top = chart_axes.value_limits(([0.999, 1.0, 1.0],), (1.2,))
    assert top <= 1.0 + chart_axes.MARGIN * 2 + 1e-12
    assert top - bottom >= chart_axes.MIN_CORRELATION_SPAN
    assert chart_axes.value_limits(([-1.0, 1.0],)) == pytest.approx((-1.1, 1.1))


def test_value_range_of_nothing_finite_is_the_whole_correlation_scale() -> None:
    assert chart_axes.value_limits(([math.nan, math.inf],), (None,)) == pytest.approx((-1.1, 1.1))
    assert chart_axes.value_limits((), bounds=None) == (0.0, 1.0)


def test_value_range_of_a_flat_line_is_widened_to_the_minimum_span() -> None:
    bottom, top = chart_axes.value_limits(([0.5] * 20,))
    assert top - bottom == pytest.approx(chart_axes.MIN_CORRELATION_SPAN * 1.1)
    assert (bottom + top) / 2 == pytest.approx(0.5)


def test_unbounded_range_for_prices_rebased_to_100() -> None:
    bottom, top = chart_axes.value_limits(([100.0, 131.0, 88.0],), bounds=None, min_span=0.0)
    assert bottom == pytest.approx(88 - 0.05 * 43) and top == pytest.approx(131 + 0.05 * 43)


def test_value_ticks_are_round_numbers_inside_the_range_with_enough_decimals() -> None:
    ticks = chart_axes.value_ticks(0.6875, 0.9625)
    assert ticks == pytest.approx([0.7, 0.8, 0.9])
    assert [chart_axes.value_label(t, ticks) for t in ticks] == ["0.7", "0.8", "0.9"]
    fine = chart_axes.value_ticks(0.86, 0.97)
    assert [chart_axes.value_label(t, fine) for t in fine] == [
        "0.875", "0.900", "0.925", "0.950"]
    wide = chart_axes.value_ticks(-1.1, 1.1)
    assert [chart_axes.value_label(t, wide) for t in wide] == [
        "\u22121.0", "\u22120.5", "0.0", "0.5", "1.0"]


# --- the charts use it -----------------------------------------------------------------


def test_digest_alert_chart_axis_is_fitted_to_a_high_pair_and_its_level() -> None:
    days, values, low, high = _high_pair()
    figure = png_charts.alert_history_figure(days, values, low, high, level=0.7,
                                             clear_level=0.75, start=days[-20])
    bottom, top = figure.axes[0].get_ylim()
    assert 0.6 < bottom < 0.7 and 0.95 < top <= 1.05
    labels = [t.get_text() for t in figure.axes[0].get_yticklabels()]
    assert labels == ["0.7", "0.8", "0.9"]


def _svg_texts(svg: bytes) -> list[str]:
    return [e.text or "" for e in ET.fromstring(svg).iter() if e.tag.endswith("text")]


def test_pages_chart_value_labels_follow_the_data_not_minus_one_to_one() -> None:
    days, values, low, high = _high_pair()
    chart = svg_charts.history_chart(days, values, low, high, levels=[0.7])
    texts = _svg_texts(chart.svg)
    assert "0.7" in texts and "0.9" in texts
    assert "\u22121.0" not in texts and "\u22120.5" not in texts


def test_pages_chart_date_labels_are_the_shared_date_ticks() -> None:
    days = _days(800, date(2023, 3, 1))
    values = np.full(800, 0.3)
    chart = svg_charts.history_chart(days, values, values, values)
    axis = chart_axes.date_ticks(np.datetime64(days[0]), np.datetime64(days[-1]))
    texts = _svg_texts(chart.svg)
    labels = [label for _, label in axis.ticks]
    assert len(labels) >= 3
    start = texts.index(labels[0])
    assert texts[start:start + len(labels)] == labels


# --- date ticks ------------------------------------------------------------------------


def _matplotlib_axis_ticks(first: str, last: str) -> list[tuple[str, str]]:
    """What a real matplotlib axis with the same locator and formatter draws (the reference)."""
    figure = Figure(figsize=(7.2, 2.4))
    FigureCanvasAgg(figure)
    axes = figure.add_subplot()
    x = np.arange(np.datetime64(first), np.datetime64(last) + np.timedelta64(1, "D"))
    axes.plot(x, np.zeros(x.size))
    locator = chart_axes.date_locator()
    axes.xaxis.set_major_locator(locator)
    axes.xaxis.set_major_formatter(chart_axes.date_formatter(locator))
    axes.set_xlim(x[0], x[-1])
    figure.canvas.draw()
    low, high = axes.get_xlim()
    return [(str(np.datetime64(int(t.get_loc()), "D")), t.label1.get_text())
            for t in axes.xaxis.get_major_ticks() if low <= t.get_loc() <= high]


@pytest.mark.parametrize("first, last", [
    ("2026-03-04", "2026-03-20"), ("2025-11-03", "2026-04-30"),
    ("2023-06-15", "2026-03-01"), ("2001-01-02", "2026-03-01"),
])
def test_date_ticks_are_those_a_matplotlib_date_axis_draws(first: str, last: str) -> None:
    axis = chart_axes.date_ticks(np.datetime64(first), np.datetime64(last))
    ours = [(str(d), label) for d, label in axis.ticks]
    reference = _matplotlib_axis_ticks(first, last)
    assert [d for d, _ in ours] == [d for d, _ in reference]
    # Labels too, but for the first, which may add its year (see the next test).
    assert ours[1:] == reference[1:]
    assert ours[0][1].startswith(reference[0][1])


def test_date_tick_labels_name_months_years_or_days() -> None:
    months = chart_axes.date_ticks(np.datetime64("2025-11-03"), np.datetime64("2026-04-30"))
    assert [label for _, label in months.ticks] == ["Dec 2025", "2026", "Feb", "Mar", "Apr"]
    days = chart_axes.date_ticks(np.datetime64("2026-03-04"), np.datetime64("2026-03-20"))
    assert [label for _, label in days.ticks][:2] == ["Mar 05", "Mar 09"]
    assert days.offset == "2026"
    years = chart_axes.date_ticks(np.datetime64("2001-01-02"), np.datetime64("2026-03-01"))
    assert all(re.fullmatch(r"\d{4}", label) for _, label in years.ticks)


def test_a_one_or_two_day_axis_ticks_each_day_not_hours() -> None:
    one = chart_axes.date_ticks(np.datetime64("2026-03-04"), np.datetime64("2026-03-04"))
    assert one.ticks == ((np.datetime64("2026-03-04"), "Mar 04"),) and one.offset == "2026"
    two = chart_axes.date_ticks(np.datetime64("2026-03-04"), np.datetime64("2026-03-05"))
    assert [label for _, label in two.ticks] == ["Mar 04", "Mar 05"]


def test_date_ticks_never_crowd_at_any_span_from_a_day_to_forty_years() -> None:
    """1 to 8 labels (2 or more past one day) on distinct days inside the range, none touching
    at the pages' chart width (7 pt text, about 0.6 em a character)."""
    first = np.datetime64("1990-01-02")
    axes_width_px = svg_charts.CHART_WIDTH * 0.91
    for span in [0, 1, 2, 3, 5, 8, 13, 21, 34, 55, 89, 144, 233, 377, 610, 987, 1597, 2584,
                 4181, 6765, 10946, 14600]:
        last = first + np.timedelta64(span, "D")
        axis = chart_axes.date_ticks(first, last)
        days = [d for d, _ in axis.ticks]
        labels = [label for _, label in axis.ticks]
        assert 1 <= len(labels) <= 8, (span, labels)
        assert len(labels) >= 2 or span < 1, (span, labels)
        assert days == sorted(set(days)), (span, labels)
        assert all(first <= d <= last for d in days)
        if len(days) >= 2:
            px_per_day = axes_width_px / max(span, 1)
            steps = zip(days, days[1:], strict=False)
            gap = min(int((b - a).astype(int)) for a, b in steps) * px_per_day
            widest = max(len(label) for label in labels) * 7 * 0.6 * 96 / 72
            assert gap > widest, (span, labels, gap, widest)


def test_a_date_axis_that_ends_before_it_starts_is_refused() -> None:
    with pytest.raises(ValueError, match="ends before it starts"):
        chart_axes.date_ticks(np.datetime64("2026-03-05"), np.datetime64("2026-03-04"))
