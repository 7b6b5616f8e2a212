"""Keeping the digest email under a size a mail relay accepts (`[digest] max_email_bytes`).

The email is rendered with every chart first. When the message is larger than the limit,
the charts of the last alerts shown are left out (the fewest that bring it under), then,
if charts were not enough, fewer alerts of each list are shown in full (halving down to
one; the rest stay counted in the tables by rule and group). Whatever was left out is
named in the digest's "Shortened:" line. A message still over the limit at one alert per
list is returned as it is, with `fits` false, so that it is never lost: the pipeline says
so and the send may still succeed.

Pure: rendering and the message builder are passed in or imported; no clock, no disk.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from email.message import EmailMessage

from monitor.digest.context import DigestContext
from monitor.digest.render import render_digest
from monitor.digest.rendered import RenderedDigest
from monitor.templating import SCREENFUL

ENCODED_SHARE = 1.37
"""Bytes of an image in the email per byte of PNG: base64 (4/3) and its line breaks."""


@dataclass(frozen=True)
class FittedDigest:
    """A rendered digest, its email, and how it was made to fit.

    Attributes
    ----------
    rendered : RenderedDigest
    message : EmailMessage
    size : int
        Bytes of the message as sent.
    limit : int
        Alerts of each list shown in full.
    charts : int
        Alert charts carried.
    charts_left_out : int
        Alert charts left out for size.
    fits : bool
        True when `size` is within the limit.
    """

    rendered: RenderedDigest
    message: EmailMessage
    size: int
    limit: int
    charts: int
    charts_left_out: int
    fits: bool


def _alert_images(rendered: RenderedDigest) -> list[int]:
    """Bytes of each alert chart in the email, in the order shown."""
    return [int(len(image.png) * ENCODED_SHARE) for image in rendered.images
            if image.filename.startswith("alert-")]


def fit_email(ctx: DigestContext, build: Callable[[RenderedDigest], EmailMessage],
              max_bytes: int) -> FittedDigest:
    """Render `ctx` and build its email with `build`, within `max_bytes` when possible.

    Parameters
    ----------
    ctx : DigestContext
        The evening's digest.
    build : callable
        The rendered digest to its email (`monitor.digest.build_message` with the headers).
    max_bytes : int
        Largest message in bytes, as ``len(message.as_bytes())``.

    Returns
    -------
    FittedDigest
    """
    rendered = render_digest(ctx)
    message = build(rendered)
    size = len(message.as_bytes())
    charts = all_charts = len(_alert_images(rendered))
    limit = SCREENFUL
    while size > max_bytes:
        sizes = _alert_images(rendered)
        if charts > 0:
            # Leave out the last charts whose bytes cover the excess (at least one).
            excess, drop = size - max_bytes, 0
            while drop < charts and sum(sizes[charts - drop:]) < excess:
                drop += 1
            charts -= max(1, drop)
        elif limit > 1:
            limit = max(1, limit // 2)
        else:
            break
        rendered = render_digest(ctx, limit=limit, charts=charts, max_email_bytes=max_bytes)
        message = build(rendered)
        size = len(message.as_bytes())
        charts = min(charts, len(_alert_images(rendered)))
    return FittedDigest(rendered=rendered, message=message, size=size, limit=limit,
                        charts=charts, charts_left_out=all_charts - charts,
                        fits=size <= max_bytes)


__all__ = ["ENCODED_SHARE", "FittedDigest", "fit_email"]
