"""Rendering the evening digest: its subject line, its HTML (for files and for email) and
its plain-text part, from a `DigestContext`.

Pure apart from Jinja and matplotlib: no clock (the times shown are passed in), no store,
no disk. The figures come from `monitor.digest.figures`, the order of every list from
`monitor.digest.order`, the footer's cautions from `monitor.digest.footer`, and what a
long list leaves out from `monitor.digest.flood`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace
from typing import Any

from monitor.digest import png_charts
from monitor.digest.context import AlertView, DigestContext
from monitor.digest.figures import build_figures
from monitor.digest.flood import SCREENFUL, shortened_line, summarise
from monitor.digest.footer import cautions
from monitor.digest.order import alert_sort_key, issue_sort_key, mover_sort_key
from monitor.digest.rendered import RenderedDigest
from monitor.templating import MINUS, format_date, make_environment


def _one_line(text: str) -> str:
    # A header value must never carry a line break (header injection).
    return " ".join(text.split())


def digest_subject(ctx: DigestContext) -> str:
    """Subject line, e.g. "Kelvara Rates: correlation digest 2026-03-05 — 2 new, ..."."""
    subject = (
        f"{ctx.desk}: correlation digest {format_date(ctx.run_day)} \u2014 "
        f"{len(ctx.new_alerts)} new, {ctx.open_count} still open, "
        f"{len(ctx.cleared)} cleared"
    )
    if ctx.data_attention:
        subject += " \u2014 check data first"
    return _one_line(subject)


def method_notes(*lists: Sequence[AlertView]) -> list[tuple[str, str]]:
    """(rule name, method note) for each rule of the given alerts that has a note, once
    each, in the order the rules first appear."""
    notes: dict[str, str] = {}
    for alerts in lists:
        for alert in alerts:
            if alert.method_note:
                notes.setdefault(alert.rule_name, alert.method_note)
    return list(notes.items())


def render_digest(ctx: DigestContext, *, limit: int = SCREENFUL, charts: int | None = None,
                  max_email_bytes: int | None = None) -> RenderedDigest:
    """Render one evening's digest to HTML (two variants), plain text and PNG charts.

    Parameters
    ----------
    ctx : DigestContext
        What to show. Lists are re-ordered here: alerts most severe first
        (`alert_sort_key`), movers by largest |change| (unknown changes last), data
        issues by kind. A list of new or still-open alerts longer than
        `monitor.digest.flood.SCREENFUL` shows its strongest alerts in full and a summary
        by rule and group for the rest; charts are drawn for the shown alerts only, so
        the email does not grow with the flood.

    limit : int
        Most alerts of each list shown in full (`SCREENFUL`; `fit_email` lowers it).
    charts : int, optional
        Most alert charts (the first shown alerts'); None: one per shown new alert.
    max_email_bytes : int, optional
        The size limit charts were left out for, named in the "Shortened:" line.

    Returns
    -------
    RenderedDigest
        Subject, HTML for files and for email, text, images and attachments.
    """
    new_alerts = sorted(ctx.new_alerts, key=alert_sort_key)
    continuing = sorted(ctx.continuing, key=alert_sort_key)
    acknowledged = sorted(ctx.acknowledged, key=alert_sort_key)
    cleared = sorted(ctx.cleared, key=alert_sort_key)
    new_list = summarise(new_alerts, limit=limit, opened=ctx.as_of)
    continuing_list = summarise(continuing, limit=limit, state="open")
    acknowledged_list = summarise(acknowledged, limit=limit, state="open")
    cleared_list = summarise(cleared, limit=limit, state="cleared")
    chartable = [a for a in new_list.shown if a.history is not None]
    charted = chartable if charts is None else chartable[:max(0, charts)]
    drawn = {id(a) for a in charted}
    images, by_key, tables, attachments = build_figures(
        ctx, [a if id(a) in drawn else replace(a, history=None) for a in new_list.shown])
    pages = (f"{ctx.pages_url}index.html" if ctx.pages_url else "index.html")
    shortened = shortened_line(
        [("new alerts", new_list), ("still open", continuing_list),
         ("acknowledged", acknowledged_list), ("cleared today", cleared_list)],
        charts_left_out=len(chartable) - len(charted), max_email_bytes=max_email_bytes,
        pages=pages)
    environment = make_environment()
    common: dict[str, Any] = {
        "ctx": ctx,
        "subject": digest_subject(ctx),
        "new_alerts": new_alerts,
        "continuing": continuing,
        "new_list": new_list,
        "continuing_list": continuing_list,
        "screenful": SCREENFUL,
        "method_notes": method_notes(new_alerts, continuing, ctx.acknowledged, ctx.cleared),
        "acknowledged": acknowledged,
        "cleared": cleared,
        "acknowledged_list": acknowledged_list,
        "cleared_list": cleared_list,
        "shortened": shortened,
        "movers": sorted(ctx.movers, key=mover_sort_key),
        "data_quality": sorted(ctx.data_quality, key=issue_sort_key),
        "matrix_tables": tables,
        "images": by_key,
        "cautions": cautions(ctx.parameters),
        "chart_key": png_charts.ALERT_CHART_KEY,
    }
    html_template = environment.get_template("digest.html")
    html_files = html_template.render(common, image_src={k: v.filename for k, v in by_key.items()})
    html_email = html_template.render(
        common, image_src={k: f"cid:{v.cid}" for k, v in by_key.items()}
    )
    # The text part is what gets pasted into spreadsheets: a typographic minus would arrive
    # as text there, so it is written as the ASCII hyphen-minus.
    text = environment.get_template("digest.txt").render(common).replace(MINUS, "-")
    return RenderedDigest(
        subject=common["subject"],
        html_for_files=html_files,
        html_for_email=html_email,
        text=text,
        images=tuple(images),
        attachments=tuple(attachments),
        as_of=ctx.as_of,
    )


__all__ = ["digest_subject", "method_notes", "render_digest"]
