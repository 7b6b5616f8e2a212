"""Where every file of the history site goes, and the file names made from desk data.

This module owns the site's layout on disk, the safe file name derived from any text
(`safe_name`), the page path of a pair, a target and a rule, the anchor of an alert
inside a page, and the check that a path given from outside stays inside the site.

Layout of a built site (all links are relative, so it works opened straight from disk)::

    index.html                every alert; filter and sort with site.js
    rules.html                the configured rules
    rules/<name>.html         one rule: its parameters and its alerts
    pairs/<name>.html         one pair: measure histories, alert periods, events,
    pairs/<name>-<k>.svg      acknowledgements and drivers; chart k of the page
    targets/<name>.html       a group (group-average rules) or one instrument (stale-data rules)
    runs.html                 the runs ledger
    digests.html              links to archived digests (copied there by the pipeline)
    site.js  site.css  favicon.svg

A pair is identified regardless of order: ("KLV", "DUNQ") and ("DUNQ", "KLV") share one
page, shown in the order the `PairPage` gives.
"""

from __future__ import annotations

import hashlib
import json
import re
import unicodedata
from pathlib import PurePosixPath

from monitor.errors import ComoveError

SITE_ASSETS: tuple[str, ...] = ("site.js", "site.css", "favicon.svg")
"""Files copied unchanged from ``templates/pages/`` into the site's top folder."""

DIGEST_ARCHIVE_DIR = "digests"
"""Folder of the site where the pipeline is expected to copy archived digests.

`monitor.pages.serve` relaxes its style policy there only, because digests are email HTML with
inline styles.
"""

SLUG_LENGTH = 40
"""Longest readable part of a `safe_name`."""
HASH_LENGTH = 12
"""Hex digits of SHA-256 in a `safe_name` (48 bits)."""


# Latin letters that Unicode does not decompose into a base letter and an accent, so NFKD
# alone would drop them from the readable part ("Ærø" would become "r").
_LETTERS_WITHOUT_DECOMPOSITION = str.maketrans({
    "Æ": "AE", "æ": "ae", "Ø": "O", "ø": "o", "Œ": "OE", "œ": "oe", "ß": "ss", "Đ": "D",
    "đ": "d", "Ł": "L", "ł": "l", "Þ": "Th", "þ": "th", "Ð": "D", "ð": "d", "ı": "i",
})


def safe_name(text: str) -> str:
    """Turn any text (a symbol, a rule name) into a file name that is safe everywhere.

    Parameters
    ----------
    text : str
        Any string, including "/", "..", spaces, backslashes, NUL, non-ASCII letters or
        thousands of characters.

    Returns
    -------
    str
        ``<slug>-<hash>``: the slug is at most `SLUG_LENGTH` lower-case ASCII letters,
        digits and "-" (accents dropped, "Æ" spelled "ae", other runs of characters become
        one "-"; "x" when nothing is left), starting with a letter or digit; the hash is the first
        `HASH_LENGTH` hex digits of SHA-256 of the exact text. So the name never holds a
        separator, a dot or a capital, two texts differing only in case or punctuation
        still get different names (also on case-insensitive file systems), and the same
        text gives the same name on every machine and run.
    """
    spelled = text.translate(_LETTERS_WITHOUT_DECOMPOSITION)
    folded = unicodedata.normalize("NFKD", spelled).encode("ascii", "ignore").decode("ascii")
    slug = re.sub(r"[^a-z0-9]+", "-", folded.lower()).strip("-")[:SLUG_LENGTH].strip("-")
    digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:HASH_LENGTH]
    return f"{slug or 'x'}-{digest}"


def _pair_key(a: str, b: str) -> tuple[str, str]:
    first, second = sorted((a, b))
    return (first, second)


def pair_page_path(a: str, b: str) -> str:
    """Site-relative path of the page of pair (a, b); the same for (b, a).

    JSON of the sorted pair is what is named, so no choice of separator can make two
    different pairs share a page (a symbol may itself hold "/").
    """
    return f"pairs/{safe_name(json.dumps(_pair_key(a, b)))}.html"


def target_page_path(kind: str, label: str) -> str:
    """Site-relative path of the page of a group or instrument target."""
    return f"targets/{safe_name(json.dumps([kind, label]))}.html"


def rule_page_path(name: str) -> str:
    """Site-relative path of the page of the rule called `name`."""
    return f"rules/{safe_name(name)}.html"


def check_relative_path(field_name: str, path: str) -> str:
    """Check that `path` is a plain relative path inside the site and return it.

    Raises
    ------
    ComoveError
        Empty, absolute, with a drive, a backslash, a NUL, a scheme, or a ".." part.
    """
    parts = PurePosixPath(path).parts
    bad = (
        not path
        or path.startswith("/")
        or "\\" in path
        or "\x00" in path
        or ":" in path
        or any(part in ("..", ".") for part in path.split("/"))
        or not parts
    )
    if bad:
        raise ComoveError(f"{field_name}: {path!r} is not a relative path inside the site")
    return path


def alert_anchor(alert_id: int | str) -> str:
    """Id of an alert's row inside a page: "alert-7", or a `safe_name` for a text id."""
    if isinstance(alert_id, int) and not isinstance(alert_id, bool):
        return f"alert-{alert_id}"
    return f"alert-{safe_name(str(alert_id))}"



__all__ = [
    "DIGEST_ARCHIVE_DIR",
    "HASH_LENGTH",
    "SITE_ASSETS",
    "SLUG_LENGTH",
    "alert_anchor",
    "check_relative_path",
    "pair_page_path",
    "rule_page_path",
    "safe_name",
    "target_page_path",
]
