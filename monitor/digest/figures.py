"""The digest's figures: which PNG charts it carries, their names, ids and alternative text,
and the group matrices beside the heatmaps (a table, or a CSV file for large groups).

Drawing is `monitor.digest.png_charts`' job; this module decides what is drawn for one
evening, names each image (file name beside digest.html, Content-ID in the email) and
writes the words a reader without images gets instead.
"""

from __future__ import annotations

import csv
import io
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from monitor.digest import png_charts
from monitor.digest.context import AlertView, DigestContext, _finite
from monitor.digest.rendered import DigestAttachment, DigestImage
from monitor.templating import format_corr, format_date

MATRIX_TABLE_MAX = 12
"""Largest group whose full matrix is printed as a table; larger ones go to a CSV file."""


def _slug(text: str) -> str:
    slug = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")
    return slug[:40] or "group"


def _alert_alt(alert: AlertView) -> str:
    parts = [
        f"Chart of {alert.measure} for {alert.pair} over "
        f"{len(alert.history.dates) if alert.history else 0} days:",
        f"value {format_corr(alert.value)},",
        f"band {format_corr(alert.band_low)} to {format_corr(alert.band_high)}",
    ]
    if _finite(alert.level):
        parts.append(f", level {format_corr(alert.level)}")
    if _finite(alert.clear_level):
        parts.append(f", clears at {format_corr(alert.clear_level)}")
    parts.append(f", alert since {format_date(alert.opened)}.")
    return " ".join(parts).replace(" ,", ",")


@dataclass(frozen=True)
class MatrixTable:
    """A heatmap's matrix ordered as drawn, for the table beside it.

    `symbols` head the columns, each row starts with its own symbol. `across` marks the
    matrix between two groups (a ``between`` rule's), whose `group` reads "A × B".
    """

    group: str
    symbols: tuple[str, ...]
    rows: tuple[tuple[str, tuple[float, ...]], ...]
    image_key: str | None
    csv_name: str | None
    note: str
    across: bool = False


def _matrix_csv(symbols: Sequence[str], matrix: np.ndarray,
                rows: Sequence[str] | None = None) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["symbol", *symbols])
    for symbol, row in zip(symbols if rows is None else rows, matrix, strict=True):
        writer.writerow([symbol, *("" if not math.isfinite(v) else f"{v:.4f}" for v in row)])
    return buffer.getvalue().encode("utf-8")


def build_figures(
    ctx: DigestContext, new_alerts: Sequence[AlertView]
) -> tuple[
    list[DigestImage], dict[str, DigestImage], list[MatrixTable], list[DigestAttachment]
]:
    """Draw and name every figure of one evening's digest.

    Parameters
    ----------
    ctx : DigestContext
        The evening's context (its group_averages and heatmaps, in the desk's group order).
    new_alerts : sequence of AlertView
        The new alerts in display order; each with a history gets one chart, numbered in
        that order. NaN values in a history are drawn as gaps.

    Returns
    -------
    images : list of DigestImage
        Every chart in the order shown: alerts, group averages, heatmaps, matrices across
        groups.
    by_key : dict of str to DigestImage
        The same images by template key ("alert-1", "group-average-1", "heatmap-1",
        "across-1", ...).
    tables : list of MatrixTable
        One per heatmap, instruments in the drawn (clustered) order; a group of fewer
        than two instruments gets a note and no image. Then one per cross-group matrix
        (`across` true), rows and columns in the desk's order.
    attachments : list of DigestAttachment
        CSV matrices of groups larger than `MATRIX_TABLE_MAX` (NaN written as "").
    """
    stamp = ctx.as_of.strftime("%Y%m%d")
    images: list[DigestImage] = []
    by_key: dict[str, DigestImage] = {}

    def add(key: str, stem: str, chart: png_charts.ChartImage, alt: str) -> None:
        image = DigestImage(
            filename=f"{stem}.png",
            cid=f"{stem}.{stamp}@comove",
            png=chart.png,
            width=chart.width,
            height=chart.height,
            alt=alt,
        )
        images.append(image)
        by_key[key] = image

    for index, alert in enumerate(new_alerts, start=1):
        if alert.history is None:
            continue
        chart = png_charts.alert_history_chart(
            alert.history.dates, alert.history.values,
            alert.history.band_low, alert.history.band_high,
            level=alert.level, clear_level=alert.clear_level, start=alert.opened,
            title=f"{alert.pair}  {alert.measure}",
        )
        add(f"alert-{index}", f"alert-{index:02d}", chart, _alert_alt(alert))

    for index, group in enumerate(ctx.group_averages, start=1):
        if not group.history_dates:
            continue
        chart = png_charts.group_average_chart(
            group.history_dates, group.history_values, title=f"{group.group}: average"
        )
        add(
            f"group-average-{index}", f"group-{index:02d}-{_slug(group.group)}-average", chart,
            f"Average pairwise correlation of {group.group} over "
            f"{len(group.history_dates)} days: now {format_corr(group.average_now)}, "
            f"{ctx.parameters.group_average_days} days earlier "
            f"{format_corr(group.average_before)}.",
        )

    tables: list[MatrixTable] = []
    attachments: list[DigestAttachment] = []
    for index, heatmap in enumerate(ctx.heatmaps, start=1):
        stem = f"group-{index:02d}-{_slug(heatmap.group)}"
        n = len(heatmap.symbols)
        if n < 2:
            tables.append(MatrixTable(
                heatmap.group, tuple(heatmap.symbols), (), None, None,
                "One instrument only: no pairs to show."
                if n == 1
                else "No instruments: no pairs to show.",
            ))
            continue
        chart, ordered = png_charts.heatmap_chart(
            heatmap.symbols, heatmap.matrix, title=f"{heatmap.group}: correlation matrix"
        )
        position = {symbol: i for i, symbol in enumerate(heatmap.symbols)}
        order = [position[s] for s in ordered]
        matrix = heatmap.matrix[np.ix_(order, order)]
        key = f"heatmap-{index}"
        csv_name = None
        rows: tuple[tuple[str, tuple[float, ...]], ...] = ()
        if n <= MATRIX_TABLE_MAX:
            rows = tuple(
                (s, tuple(float(v) for v in row)) for s, row in zip(ordered, matrix, strict=True)
            )
            note = "Instruments ordered so that those moving together sit together."
        else:
            csv_name = f"{stem}-matrix.csv"
            attachments.append(DigestAttachment(csv_name, "text/csv", _matrix_csv(ordered, matrix)))
            note = (
                f"{n} instruments: the full matrix, in the order drawn, is in the "
                f"attached file {csv_name}."
            )
        add(
            key, f"{stem}-heatmap", chart,
            f"Heatmap of the correlation matrix of {heatmap.group}, {n} instruments "
            "ordered by clustering; the values are in the table or file beside it.",
        )
        tables.append(MatrixTable(heatmap.group, ordered, rows, key, csv_name, note))

    for index, cross in enumerate(ctx.cross_matrices, start=1):
        name = f"{cross.left} \u00d7 {cross.right}"
        stem = f"across-{index:02d}-{_slug(cross.left)}-{_slug(cross.right)}"
        chart = png_charts.cross_heatmap_chart(
            cross.rows, cross.columns, cross.matrix, title=f"{name}: correlation across groups"
        )
        key = f"across-{index}"
        csv_name = None
        rows = ()
        watched = ", ".join(cross.rules)
        if max(len(cross.rows), len(cross.columns)) <= MATRIX_TABLE_MAX:
            rows = tuple((symbol, tuple(float(v) for v in row))
                         for symbol, row in zip(cross.rows, cross.matrix, strict=True))
            note = (f"Rows {cross.left}, columns {cross.right}: the pairs rule {watched} "
                    "watches.")
        else:
            csv_name = f"{stem}-matrix.csv"
            attachments.append(DigestAttachment(
                csv_name, "text/csv", _matrix_csv(cross.columns, cross.matrix, cross.rows)))
            note = (f"Rows {cross.left}, columns {cross.right} (rule {watched}): "
                    f"{len(cross.rows)} x {len(cross.columns)} pairs, the full matrix is in "
                    f"the attached file {csv_name}.")
        add(key, f"{stem}-heatmap", chart,
            f"Heatmap of the correlations between {cross.left} ({len(cross.rows)} "
            f"instruments, rows) and {cross.right} ({len(cross.columns)}, columns); the "
            "values are in the cells and in the table or file beside it.")
        tables.append(MatrixTable(name, tuple(cross.columns), rows, key, csv_name, note,
                                  across=True))

    return images, by_key, tables, attachments


__all__ = ["MATRIX_TABLE_MAX", "MatrixTable", "build_figures"]
