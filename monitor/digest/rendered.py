"""The digest in the forms it is delivered in: HTML, text, PNG images, attached files.

Plain frozen dataclasses, the output of `monitor.digest.render.render_digest` and the input
of the email (`monitor.digest.message`) and of the folder writer (`monitor.digest.files`),
kept apart so that those two need neither Jinja nor matplotlib.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date


@dataclass(frozen=True)
class DigestImage:
    """One chart of the digest.

    Attributes
    ----------
    filename : str
        File name beside digest.html (and the MIME part's file name).
    cid : str
        Content-ID without angle brackets; the email's HTML refers to it as ``cid:<cid>``.
    png : bytes
        The PNG file.
    width, height : int
        Display size in CSS pixels.
    alt : str
        Alternative text saying what the chart shows and its key numbers.
    """

    filename: str
    cid: str
    png: bytes
    width: int
    height: int
    alt: str


@dataclass(frozen=True)
class DigestAttachment:
    """A file sent with the digest (full matrices of large groups, as CSV)."""

    filename: str
    content_type: str
    data: bytes


@dataclass(frozen=True)
class RenderedDigest:
    """The digest in every form it is delivered in.

    Attributes
    ----------
    subject : str
        Single-line subject naming the desk, the date and the counts.
    html_for_files : str
        HTML whose images are the file names in `images` (to sit in one folder).
    html_for_email : str
        The same HTML with images as ``cid:`` references.
    text : str
        Plain-text alternative with the same facts.
    images : tuple of DigestImage
        Every chart, in the order they appear.
    attachments : tuple of DigestAttachment
        Further files (CSV matrices of groups larger than
        `monitor.digest.figures.MATRIX_TABLE_MAX`).
    as_of : date
        The digest's business day.
    """

    subject: str
    html_for_files: str
    html_for_email: str
    text: str
    images: tuple[DigestImage, ...]
    attachments: tuple[DigestAttachment, ...]
    as_of: date


__all__ = ["DigestAttachment", "DigestImage", "RenderedDigest"]
