"""The digest on disk: `write_digest` and the paths it returns.

The only module of the digest that touches the disk: one folder per evening with
digest.html and its PNGs beside it, digest.txt, digest.eml and any attached files.
"""

from __future__ import annotations

from dataclasses import dataclass
from email.message import EmailMessage
from pathlib import Path

from monitor.digest.message import mime_body
from monitor.digest.rendered import RenderedDigest


@dataclass(frozen=True)
class DigestPaths:
    """Files written by `write_digest`."""

    html: Path
    text: Path
    eml: Path
    images: tuple[Path, ...]
    attachments: tuple[Path, ...]


def write_digest(
    rendered: RenderedDigest, out_dir: Path | str, *, message: EmailMessage | None = None
) -> DigestPaths:
    """Write the digest to a folder: digest.html with its PNGs beside it, digest.txt,
    digest.eml and any attached files.

    Parameters
    ----------
    rendered : RenderedDigest
        Output of `render_digest`.
    out_dir : Path or str
        Folder, created if missing; existing files of the same names are replaced.
    message : EmailMessage, optional
        The message to save as digest.eml; by default the MIME body alone (subject, no
        addresses), enough to preview in a mail reader.

    Returns
    -------
    DigestPaths
        Paths of every file written.
    """
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    html_path = folder / "digest.html"
    html_path.write_text(rendered.html_for_files, encoding="utf-8")
    text_path = folder / "digest.txt"
    text_path.write_text(rendered.text, encoding="utf-8")
    image_paths = []
    for image in rendered.images:
        path = folder / image.filename
        path.write_bytes(image.png)
        image_paths.append(path)
    attachment_paths = []
    for attachment in rendered.attachments:
        path = folder / attachment.filename
        path.write_bytes(attachment.data)
        attachment_paths.append(path)
    eml_path = folder / "digest.eml"
    eml_path.write_bytes((message or mime_body(rendered)).as_bytes())
    return DigestPaths(
        html=html_path, text=text_path, eml=eml_path,
        images=tuple(image_paths), attachments=tuple(attachment_paths),
    )


__all__ = ["DigestPaths", "write_digest"]
