"""The digest as an email: its MIME structure and headers.

    multipart/mixed                   (only when files are attached)
      multipart/alternative
        text/plain                    the same facts as the HTML, for any mail reader
        multipart/related
          text/html                   tables and inline styles, images as cid:...
          image/png ...               inline, one per chart
      text/csv ...                    matrices of groups too large for an email table

Named `message`, not `email`, so that nothing here shadows the standard library's package.
No clock (the Date header is passed in) and no network: sending is `monitor.digest.mailer`'s.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from datetime import datetime
from email.message import EmailMessage
from email.policy import SMTP
from email.utils import format_datetime
from typing import cast

from monitor.digest.rendered import RenderedDigest
from monitor.errors import ConfigError


def mime_body(rendered: RenderedDigest) -> EmailMessage:
    """The digest's MIME structure with its Subject and no addresses (see the module's
    docstring); `build_message` adds the headers, `write_digest` saves it as a preview."""
    message = EmailMessage(policy=SMTP)
    message["Subject"] = rendered.subject
    message.set_content(rendered.text, subtype="plain", charset="utf-8")
    message.add_alternative(rendered.html_for_email, subtype="html", charset="utf-8")
    html_part = cast(list[EmailMessage], message.get_payload())[1]
    for image in rendered.images:
        html_part.add_related(
            image.png, maintype="image", subtype="png", cid=f"<{image.cid}>",
            disposition="inline", filename=image.filename,
        )
    for attachment in rendered.attachments:
        maintype, subtype = attachment.content_type.split("/", 1)
        message.add_attachment(
            attachment.data, maintype=maintype, subtype=subtype, filename=attachment.filename
        )
    return message


def build_message(
    rendered: RenderedDigest,
    *,
    sender: str,
    recipients: Sequence[str],
    date: datetime,
    message_id_domain: str = "localhost",
) -> EmailMessage:
    """Build the digest email (standard library `EmailMessage`, policy SMTP).

    Parameters
    ----------
    rendered : RenderedDigest
        Output of `render_digest`.
    sender : str
        From address.
    recipients : sequence of str
        To addresses; at least one.
    date : datetime
        Value of the Date header; must carry a time zone. Passed in so that building a
        message never reads the clock.
    message_id_domain : str
        Right-hand side of the Message-ID. The left side is derived from the content, so
        a digest re-sent after a failure keeps its Message-ID and readers' mail systems
        can drop the duplicate.

    Returns
    -------
    EmailMessage
        multipart/alternative (text/plain first, then multipart/related with the HTML and
        its inline PNGs), wrapped in multipart/mixed when CSV files are attached.

    Raises
    ------
    ConfigError
        Empty or multi-line sender or recipients, or a naive `date`.
    """
    if not recipients:
        raise ConfigError("recipients: no address given")
    for key, address in [("sender", sender), *(("recipients", r) for r in recipients)]:
        if not address.strip() or "\n" in address or "\r" in address:
            raise ConfigError(f"{key}: {address!r} is not a single-line address")
    if date.tzinfo is None or date.utcoffset() is None:
        raise ConfigError(f"date: {date.isoformat()} has no time zone")
    message = mime_body(rendered)
    digest = hashlib.sha256()
    for part in (rendered.subject, rendered.text, rendered.html_for_email):
        digest.update(part.encode("utf-8"))
    message["From"] = sender
    message["To"] = ", ".join(recipients)
    message["Date"] = format_datetime(date)
    message["Message-ID"] = (
        f"<comove-digest-{rendered.as_of.isoformat()}-{digest.hexdigest()[:24]}"
        f"@{message_id_domain}>"
    )
    return message


__all__ = ["build_message", "mime_body"]
