"""How the history pages write words and numbers that the shared filters do not cover.

This module owns the event words of the event tables, the formats of durations and
observation counts, and the sort keys written beside numbers for site.js. Correlations,
changes, percentages, p-values and dates use `monitor.templating`'s filters, shared with
the digest; the cautions are `monitor.cautions`, also shared with the digest.
"""

from __future__ import annotations

import math

EVENT_WORDS: dict[str, str] = {
    "opened": "opened",
    "continuing": "still open (reminder)",
    "cleared": "cleared",
    "retracted": "retracted (a rerun no longer produces it)",
}
"""How each event kind is written in the event tables."""


def format_duration(seconds: float | None) -> str:
    """Format a duration: "0.4 s", "42.0 s", "3 min 05 s", "2 h 07 min"; None -> "n/a"."""
    if seconds is None or not math.isfinite(seconds) or seconds < 0:
        return "n/a"
    if seconds < 60:
        return f"{seconds:.1f} s"
    whole = round(seconds)
    if whole < 3600:
        return f"{whole // 60} min {whole % 60:02d} s"
    return f"{whole // 3600} h {whole % 3600 // 60:02d} min"


def format_count(value: float | None) -> str:
    """Format an observation count: whole numbers plain ("63"), effective ones "32.3"."""
    if value is None or not math.isfinite(value):
        return "n/a"
    if float(value).is_integer():
        return f"{int(value)}"
    return f"{value:.1f}"


def sort_number(value: float | None) -> str:
    """Sort key written beside a number for site.js: full precision, "" for None or NaN."""
    # Empty sort keys go last whatever the direction (site.js); repr keeps full precision.
    if value is None or not math.isfinite(value):
        return ""
    return repr(float(value))


__all__ = ["EVENT_WORDS", "format_count", "format_duration", "sort_number"]
