"""The evening digest: context, render (HTML, text, PNG charts), email and mailer.

Code outside this package imports from here; the modules inside are free to move.
"""

from monitor.digest.build import AlertFacts, DigestInputs, build_context
from monitor.digest.mailer import MailError, SmtpSettings, send_message
from monitor.digest.render import (
    DataIssueView,
    RenderedDigest,
    build_message,
    render_digest,
    write_digest,
)

__all__ = [
    "AlertFacts",
    "DataIssueView",
    "DigestInputs",
    "MailError",
    "RenderedDigest",
    "SmtpSettings",
    "build_context",
    "build_message",
    "render_digest",
    "send_message",
    "write_digest",
]
