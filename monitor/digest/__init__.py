"""The evening digest: context, render (HTML, text, PNG charts), email and mailer.

Code outside this package imports from here; the modules inside are free to move:

- `build`: the context from the pipeline's plain data (engine calls only);
- `context`: the context dataclasses and their checks;
- `order`: the order in which alerts, changes and data issues are shown;
- `flood`: which alerts of a long list are shown in full, and the summary of the rest;
- `footer`: the cautions and the noise band they quote;
- `figures`: which charts and matrix tables the digest carries, and their names;
- `png_charts`: drawing the charts;
- `render`: subject, HTML and text (`render_digest`);
- `fit`: the email kept under `[digest] max_email_bytes` (`fit_email`);
- `rendered`: the rendered digest's dataclasses;
- `message`: the MIME email (`build_message`);
- `files`: the digest folder on disk (`write_digest`);
- `mailer`: sending over SMTP.
"""

from monitor.digest.build import AlertFacts, DigestInputs, build_context
from monitor.digest.context import DataIssueView
from monitor.digest.files import write_digest
from monitor.digest.fit import FittedDigest, fit_email
from monitor.digest.mailer import MailError, SmtpSettings, send_message
from monitor.digest.message import build_message
from monitor.digest.render import render_digest
from monitor.digest.rendered import RenderedDigest

__all__ = [
    "AlertFacts",
    "DataIssueView",
    "DigestInputs",
    "FittedDigest",
    "MailError",
    "RenderedDigest",
    "SmtpSettings",
    "build_context",
    "build_message",
    "fit_email",
    "render_digest",
    "send_message",
    "write_digest",
]
