"""Rendering the evening digest: its subject line, its HTML (for files and for email) and
its plain-text part, from a `DigestContext`.

Pure apart from Jinja and matplotlib: no clock (the times shown are passed in), no store,
no disk. The figures come from `monitor.digest.figures`, the order of every list from
`monitor.digest.order`, the footer's cautions from `monitor.digest.footer`.
"""

from __future__ import annotations

from typing import Any

from monitor.digest import png_charts
from monitor.digest.context import DigestContext
from monitor.digest.figures import build_figures
from monitor.digest.footer import cautions
from monitor.digest.order import alert_sort_key, issue_sort_key, mover_sort_key
from monitor.digest.rendered import RenderedDigest
from monitor.templating import format_date, make_environment


def _one_line(text: str) -> str:
    # A header value must never carry a line break (header injection).
    return " ".join(text.split())


def digest_subject(ctx: DigestContext) -> str:
    """Subject line, e.g. "Kelvara Rates: correlation digest 2026-03-05 — 2 new, ..."."""
    subject = (
        f"{ctx.desk}: correlation digest {format_date(ctx.as_of)} \u2014 "
        f"{len(ctx.new_alerts)} new, {ctx.open_count} still open, "
        f"{len(ctx.cleared)} cleared"
    )
    if ctx.data_attention:
        subject += " \u2014 check data first"
    return _one_line(subject)


def render_digest(ctx: DigestContext) -> RenderedDigest:
    """Render one evening's digest to HTML (two variants), plain text and PNG charts.

    Parameters
    ----------
    ctx : DigestContext
        What to show. Lists are re-ordered here: alerts most severe first
        (`alert_sort_key`), movers by largest |change| (unknown changes last), data
        issues by kind.

    Returns
    -------
    RenderedDigest
        Subject, HTML for files and for email, text, images and attachments.
    """
    new_alerts = sorted(ctx.new_alerts, key=alert_sort_key)
    images, by_key, tables, attachments = build_figures(ctx, new_alerts)
    environment = make_environment()
    common: dict[str, Any] = {
        "ctx": ctx,
        "subject": digest_subject(ctx),
        "new_alerts": new_alerts,
        "continuing": sorted(ctx.continuing, key=alert_sort_key),
        "acknowledged": sorted(ctx.acknowledged, key=alert_sort_key),
        "cleared": sorted(ctx.cleared, key=alert_sort_key),
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
    text = environment.get_template("digest.txt").render(common)
    return RenderedDigest(
        subject=common["subject"],
        html_for_files=html_files,
        html_for_email=html_email,
        text=text,
        images=tuple(images),
        attachments=tuple(attachments),
        as_of=ctx.as_of,
    )


__all__ = ["digest_subject", "render_digest"]
