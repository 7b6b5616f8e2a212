"""Heatmaps that read (values in the cells, no label cut off) and the matrix across two
groups of a `between` rule, in the digest's HTML, text and email."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pandas as pd
import pytest
from bs4 import BeautifulSoup
from matplotlib.transforms import Bbox

from monitor.digest import png_charts, render_digest
from monitor.digest.build import DigestInputs, build_context, cross_matrices
from monitor.digest.context import CrossMatrixView
from monitor.rules import build_rules
from tests.digest.test_digest_render import _context

ROWS = ("KLV", "DUNQ", "ORMA")
COLUMNS = ("TEZ10", "TEZ20")


def _inside(figure_box: Bbox, box: Bbox) -> bool:
    return (box.x0 >= figure_box.x0 - 0.5 and box.y0 >= figure_box.y0 - 0.5
            and box.x1 <= figure_box.x1 + 0.5 and box.y1 <= figure_box.y1 + 0.5)


@pytest.mark.parametrize("n", [2, 8, 15, 30])
def test_no_label_of_a_heatmap_or_its_colour_bar_is_cut_off(n: int) -> None:
    symbols = [f"LONGNAME{k:02d}" for k in range(n)]
    rng = np.random.default_rng(n)
    matrix = np.corrcoef(rng.normal(size=(200, n)).T)
    figure = png_charts.matrix_figure(symbols, symbols, matrix, title="Kelvara core: matrix")
    renderer = figure.canvas.get_renderer()  # type: ignore[attr-defined]
    figure.canvas.draw()
    frame = figure.bbox
    texts = [t for t in figure.findobj(match=lambda a: hasattr(a, "get_text"))
             if t.get_visible() and t.get_text()]  # type: ignore[attr-defined]
    colour_bar_labels = [t.get_text() for t in figure.axes[1].get_yticklabels()]
    assert colour_bar_labels == ["\u22121", "\u22120.5", "0", "0.5", "1"]
    assert texts
    for text in texts:
        box = text.get_window_extent(renderer)  # type: ignore[attr-defined]
        assert _inside(frame, box), (text.get_text(), box, frame)  # type: ignore[attr-defined]


def test_small_heatmap_cells_carry_their_values_and_gaps_say_so() -> None:
    matrix = np.array([[1.0, 0.42, -0.13], [0.42, 1.0, np.nan], [-0.13, np.nan, 1.0]])
    figure = png_charts.matrix_figure(ROWS, ROWS, matrix)
    cells = [t.get_text() for t in figure.axes[0].texts]
    assert len(cells) == 9
    assert cells.count("1.00") == 3 and cells.count("0.42") == 2
    assert cells.count("\u22120.13") == 2 and cells.count("n/a") == 2


def test_large_heatmap_leaves_values_to_the_table_or_file() -> None:
    n = png_charts.CELL_VALUES_MAX + 1
    figure = png_charts.matrix_figure([f"S{k}" for k in range(n)], [f"S{k}" for k in range(n)],
                                      np.eye(n))
    assert not figure.axes[0].texts


def test_cross_matrix_chart_is_a_rectangle_rows_by_columns() -> None:
    matrix = np.array([[0.61, -0.2], [0.05, 0.33], [np.nan, 0.9]])
    figure = png_charts.matrix_figure(ROWS, COLUMNS, matrix)
    axes = figure.axes[0]
    assert [t.get_text() for t in axes.get_yticklabels()] == list(ROWS)
    assert [t.get_text() for t in axes.get_xticklabels()] == list(COLUMNS)
    assert [t.get_text() for t in axes.texts] == ["0.61", "\u22120.20", "0.05", "0.33", "n/a",
                                                  "0.90"]
    image = png_charts.cross_heatmap_chart(ROWS, COLUMNS, matrix)
    assert image.width > image.height
    with pytest.raises(ValueError, match="at least one instrument"):
        png_charts.cross_heatmap_chart((), COLUMNS, np.empty((0, 2)))


# --- from a between rule to the digest --------------------------------------------------


SYMBOLS = ["KLV", "DUNQ", "ORMA", "TEZ10", "TEZ20"]
GROUPS = {"Kelvara credit": ["KLV", "DUNQ", "ORMA"], "Tezlin rates": ["TEZ10", "TEZ20"]}


def _inputs(rule_tables: list[dict[str, object]]) -> DigestInputs:
    rng = np.random.default_rng(3)
    base = rng.standard_t(4, size=(300, 1)) * 0.01
    returns = pd.DataFrame(
        base * np.array([1.0, 0.8, -0.5, 0.3, 0.6]) + rng.normal(0, 0.01, (300, 5)),
        index=pd.bdate_range("2025-01-02", periods=300), columns=SYMBOLS,
    )
    returns.iloc[100:110, 2] = np.nan  # a gap: the window still has enough days
    rules = build_rules(rule_tables, symbols=SYMBOLS, groups=GROUPS)
    return DigestInputs(
        desk="Kelvara Rates & Hedges", as_of=returns.index[-1].date(),
        generated_at=dt.datetime(2026, 3, 5, 18, 30, tzinfo=dt.UTC), returns=returns,
        names={}, groups=GROUPS, rules={r.name: r for r in rules}, alerts=(),
        monitored_pairs=np.array([[0, 3]]), measures=["rolling:63"], return_kind="log",
        horizon=1, level=0.95, largest_changes_days=5, group_average_days=5, history_days=60,
    )


HEDGE = {"name": "credit-hedge", "kind": "level", "measure": "rolling:63",
         "between": ["Kelvara credit", "Tezlin rates"], "below": 0.2, "clear": 0.3}


def test_a_between_rule_gets_the_matrix_across_its_two_groups() -> None:
    inputs = _inputs([HEDGE])
    views = cross_matrices(inputs, inputs.returns.to_numpy(), {s: k for k, s in
                                                               enumerate(SYMBOLS)},
                           len(inputs.returns) - 1)
    assert len(views) == 1
    view = views[0]
    assert (view.left, view.right, view.rules) == ("Kelvara credit", "Tezlin rates",
                                                   ("credit-hedge",))
    assert view.rows == ("KLV", "DUNQ", "ORMA") and view.columns == ("TEZ10", "TEZ20")
    # Reference: pandas' Pearson correlation over the last 63 returns.
    window = inputs.returns.iloc[-63:]
    for i, a in enumerate(view.rows):
        for j, b in enumerate(view.columns):
            assert view.matrix[i, j] == pytest.approx(window[a].corr(window[b]), abs=1e-9)


def test_rules_without_between_get_no_cross_matrix_and_two_rules_share_one() -> None:
    within = {"name": "credit-core", "kind": "level", "measure": "rolling:63",
              "group": "Kelvara credit", "above": 0.9}
    assert build_context(_inputs([within])).cross_matrices == ()
    twin = dict(HEDGE, name="credit-hedge-fast", measure="rolling:21")
    views = build_context(_inputs([HEDGE, twin])).cross_matrices
    assert [v.rules for v in views] == [("credit-hedge", "credit-hedge-fast")]


def test_an_instrument_in_both_groups_is_not_paired_with_itself() -> None:
    inputs = _inputs([dict(HEDGE, between=["Kelvara credit", "Kelvara credit"])])
    view = build_context(inputs).cross_matrices[0]
    assert np.isnan(np.diag(view.matrix)).all()
    assert np.isfinite(view.matrix[0, 1])


def _digest_with_cross_matrix() -> tuple[BeautifulSoup, str]:
    cross = CrossMatrixView("Kelvara credit", "Tezlin rates", ROWS, COLUMNS,
                            np.array([[0.61, -0.2], [0.05, 0.33], [math.nan, 0.9]]),
                            rules=("credit-hedge",))
    rendered = render_digest(_context(cross_matrices=[cross]))
    return BeautifulSoup(rendered.html_for_email, "html.parser"), rendered.text


def test_digest_shows_the_cross_matrix_with_its_chart_and_table() -> None:
    soup, text = _digest_with_cross_matrix()
    block = soup.select_one("#cross-matrices .cross-matrix")
    assert block is not None
    assert "Kelvara credit \u00d7 Tezlin rates" in block.get_text()
    assert "credit-hedge" in block.get_text()
    image = block.select_one("img")
    assert image is not None and image["src"].startswith("cid:across-01-")
    rows = block.select("table.matrix tbody tr")
    assert [r.th.get_text() for r in rows] == list(ROWS)
    assert [td.get_text() for td in rows[0].select("td")] == ["0.61", "\u22120.20"]
    # The within-group section keeps its own matrices only.
    assert "Tezlin" not in soup.select_one("#group-matrices").get_text()
    assert "CORRELATION ACROSS GROUPS" in text and "Kelvara credit \u00d7 Tezlin rates" in text


def test_digest_without_between_rules_has_no_cross_section() -> None:
    soup = BeautifulSoup(render_digest(_context()).html_for_email, "html.parser")
    assert soup.select_one("#cross-matrices") is None
