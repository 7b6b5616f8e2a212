"""The one place that builds comove's Jinja environment and finds the shipped folders.

This module owns where `templates/` and `config/` are found (inside an installed wheel or
next to the package in a source checkout), the Jinja settings every rendered page shares
(autoescape for HTML, strict undefined) and the number and date filters used by the digest
and the history pages alike. Templates never format numbers themselves: they call these
filters, so one value reads the same way in the email, its text part and the pages.
It also holds `tuple_fields`, which the digest's and the pages' context dataclasses share.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import date, datetime
from pathlib import Path

import jinja2

from monitor.errors import ComoveError

SCREENFUL = 25
"""Most alerts one list of the digest, or one day of one rule on the pages, shows in full;
a longer list is summarised. About what fits on a screen or two of an email client
(common practice: a reader scans, not scrolls, an alert list)."""

MINUS = "\u2212"
"""Typographic minus sign: as wide as "+", so signed columns line up in proportional fonts."""

MISSING = "n/a"
"""What every filter prints for None or NaN, so a gap is never shown as 0."""

_PACKAGE_DIR = Path(__file__).resolve().parent


def _shipped_dir(name: str) -> Path:
    # A wheel force-includes the top-level folder as monitor/_data/<name>; a source
    # checkout (editable install or PYTHONPATH) has it beside the package instead.
    candidates = (_PACKAGE_DIR / "_data" / name, _PACKAGE_DIR.parent / name)
    for candidate in candidates:
        if candidate.is_dir():
            return candidate
    looked = " and ".join(str(c) for c in candidates)
    raise ComoveError(f"{name} folder not found: looked in {looked}")


def templates_dir() -> Path:
    """Return the folder holding comove's Jinja templates.

    Returns
    -------
    Path
        ``monitor/_data/templates`` inside an installed wheel, else the repository's
        top-level ``templates/`` next to the ``monitor`` package.

    Raises
    ------
    ComoveError
        Neither folder exists (a broken install).
    """
    return _shipped_dir("templates")


def config_dir() -> Path:
    """Return the folder holding the example and demo configuration.

    Returns
    -------
    Path
        ``monitor/_data/config`` inside an installed wheel, else the repository's
        top-level ``config/``.

    Raises
    ------
    ComoveError
        Neither folder exists (a broken install).
    """
    return _shipped_dir("config")


def tuple_fields(instance: object, *names: str) -> None:
    """Turn the named fields of a frozen dataclass into tuples, in ``__post_init__``.

    Frozen dataclasses keep whatever sequence they were given; tuples make a rendering
    context really immutable (and hashable where its items are) and let callers pass lists.

    Parameters
    ----------
    instance : object
        The dataclass instance being initialised.
    *names : str
        Fields holding any iterable; each is replaced by a tuple of its items, in order.
    """
    for name in names:
        object.__setattr__(instance, name, tuple(getattr(instance, name)))


def _is_missing(value: object) -> bool:
    if value is None:
        return True
    try:
        return math.isnan(float(value))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return False


def _with_minus(text: str) -> str:
    return MINUS + text[1:] if text.startswith("-") else text


def format_corr(value: float | None, digits: int = 2) -> str:
    """Format a correlation (or any value on the same scale) with fixed decimals.

    Parameters
    ----------
    value : float or None
        Correlation; NaN or None prints as ``"n/a"``.
    digits : int
        Decimals, 2 by default ("0.83", "−0.05").
    """
    if _is_missing(value):
        return MISSING
    text = f"{float(value):.{digits}f}"  # type: ignore[arg-type]
    if float(text) == 0.0:
        # "-0.00" would suggest a sign the rounded value no longer has.
        text = text.lstrip("-")
    return _with_minus(text)


def format_signed(value: float | None, digits: int = 2) -> str:
    """Format a change with an explicit sign: "+0.12", "−0.05", "0.00".

    Parameters
    ----------
    value : float or None
        Change; NaN or None prints as ``"n/a"``.
    digits : int
        Decimals, 2 by default.
    """
    if _is_missing(value):
        return MISSING
    text = f"{float(value):+.{digits}f}"  # type: ignore[arg-type]
    if float(text) == 0.0:
        return text[1:]
    return _with_minus(text)


def format_percent(value: float | None, digits: int = 1) -> str:
    """Format a fraction as a percentage: 0.0123 -> "1.2 %", -0.004 -> "−0.4 %".

    Parameters
    ----------
    value : float or None
        Fraction (0.01 is one per cent); NaN or None prints as ``"n/a"``.
    digits : int
        Decimals of the percentage, 1 by default.
    """
    if _is_missing(value):
        return MISSING
    text = f"{100.0 * float(value):.{digits}f}"  # type: ignore[arg-type]
    if float(text) == 0.0:
        text = text.lstrip("-")
    return f"{_with_minus(text)} %"


def format_pvalue(value: float | None) -> str:
    """Format a p-value: below 0.001 as "< 0.001", otherwise three decimals ("0.012").

    Parameters
    ----------
    value : float or None
        Probability in [0, 1]; NaN or None prints as ``"n/a"``.
    """
    if _is_missing(value):
        return MISSING
    p = float(value)  # type: ignore[arg-type]
    if p < 0.001:
        return "< 0.001"
    return f"{p:.3f}"


def format_date(value: date | datetime | None) -> str:
    """Format a date as ISO 8601 ("2026-03-05"); a datetime adds minutes and its offset.

    Parameters
    ----------
    value : date, datetime or None
        None prints as ``"n/a"``. An aware datetime keeps its own zone
        ("2026-03-05 18:30 +01:00"); a naive one prints without offset.
    """
    if value is None:
        return MISSING
    if isinstance(value, datetime):
        text = value.strftime("%Y-%m-%d %H:%M")
        offset = value.strftime("%z")
        if offset:
            text += f" {offset[:3]}:{offset[3:]}"
        return text
    return value.isoformat()


FILTERS = {
    "corr": format_corr,
    "signed": format_signed,
    "percent": format_percent,
    "pvalue": format_pvalue,
    "date": format_date,
}
"""Every filter comove's templates may use, registered together by `make_environment`."""


def make_environment(extra_loaders: Sequence[jinja2.BaseLoader] = ()) -> jinja2.Environment:
    """Build the Jinja environment shared by the digest and the history pages.

    Parameters
    ----------
    extra_loaders : sequence of jinja2.BaseLoader
        Further template sources, searched after the shipped templates folder, so a
        shipped template can never be shadowed by accident.

    Returns
    -------
    jinja2.Environment
        Autoescaping on for ``.html``, ``.htm``, ``.xml`` and ``.eml`` templates and for
        templates made from strings, off for ``.txt``; undefined names raise at render time
        (``StrictUndefined``); the filters in `FILTERS` registered.
    """
    loader = jinja2.ChoiceLoader(
        [jinja2.FileSystemLoader(str(templates_dir())), *extra_loaders]
    )
    environment = jinja2.Environment(
        loader=loader,
        autoescape=jinja2.select_autoescape(
            enabled_extensions=("html", "htm", "xml", "eml"),
            disabled_extensions=("txt",),
            default_for_string=True,
            default=True,
        ),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    environment.filters.update(FILTERS)
    return environment
