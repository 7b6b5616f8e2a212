"""Keeping an alert flood readable: which alerts of a long list are shown in full, and the
summary by rule and group that stands in for the rest.

A day can open hundreds of alerts at once (a market-wide move, a changed rule). Listing
them all would bury the few that matter and make the email grow with the flood, so a list
longer than `SCREENFUL` shows its strongest alerts as cards (charts only for those) and a
table by rule and group: how many, the strongest of each and its value, then "and N more".
The full list is one click away on the history pages (`pages_filter`).

Pure: no Jinja, no clock; the renderer calls `summarise` on lists it has already sorted
with `monitor.digest.order.alert_sort_key` (strongest evidence first).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date
from urllib.parse import urlencode

from monitor.digest.context import AlertView
from monitor.templating import SCREENFUL

NO_GROUP = "no group"
"""Group label of an alert whose instruments belong to no group of the desk."""


def group_label(alert: AlertView) -> str:
    """The alert's group as the summary shows it: "Utilities", "Rates / Utilities" for a
    pair across two groups, `NO_GROUP` when none."""
    return " / ".join(alert.groups) if alert.groups else NO_GROUP


def pages_filter(rule_name: str, *, opened: date | None = None, state: str = "") -> str:
    """The history index filtered to a rule (and a day or a state), as a site-relative
    address: ``index.html#rule=...&opened=YYYY-MM-DD`` (read by templates/pages/site.js)."""
    params = {"rule": rule_name}
    if opened is not None:
        params["opened"] = opened.isoformat()
    if state:
        params["state"] = state
    return "index.html#" + urlencode(params)


@dataclass(frozen=True)
class SummaryRow:
    """One line of the table by rule and group.

    Attributes
    ----------
    rule_name, rule_kind : str
        The rule.
    group : str
        The group label (`group_label`).
    count : int
        Alerts of the list with that rule and group (shown or not).
    strongest : AlertView
        The first of them in display order (strongest evidence).
    """

    rule_name: str
    rule_kind: str
    group: str
    count: int
    strongest: AlertView


@dataclass(frozen=True)
class AlertList:
    """A list of alerts as the digest shows it.

    Attributes
    ----------
    shown : tuple of AlertView
        The alerts shown in full, in display order: all of them, or the first
        `SCREENFUL` when the list is longer.
    total : int
        Alerts in the whole list.
    rows : tuple of SummaryRow
        By rule and group, strongest first; empty when the list is not summarised. At most
        (rules x groups) rows, whatever the size of the flood.
    links : tuple of (str, str)
        (rule name, history-index address) per rule of the list, for the full list on the
        pages; empty when not summarised.
    """

    shown: tuple[AlertView, ...]
    total: int
    rows: tuple[SummaryRow, ...] = ()
    links: tuple[tuple[str, str], ...] = ()

    @property
    def summarised(self) -> bool:
        """True when some alerts are left out of the cards."""
        return self.total > len(self.shown)

    @property
    def more(self) -> int:
        """Alerts not shown in full (the "and N more")."""
        return self.total - len(self.shown)


def summarise(alerts: Sequence[AlertView], *, limit: int = SCREENFUL,
              opened: date | None = None, state: str = "") -> AlertList:
    """Show the first `limit` alerts and summarise the others by rule and group.

    Parameters
    ----------
    alerts : sequence of AlertView
        Already in display order (strongest evidence first).
    limit : int
        Most alerts shown in full (`SCREENFUL`).
    opened : date, optional
        The day the alerts opened (new alerts), used in the pages' links.
    state : str
        An alert state for the pages' links instead ("open" for the still-open list).

    Returns
    -------
    AlertList
        Nothing is summarised when there are `limit` alerts or fewer.
    """
    if limit < 1:
        raise ValueError(f"limit: {limit!r} must be at least 1")
    if len(alerts) <= limit:
        return AlertList(shown=tuple(alerts), total=len(alerts))
    counts: dict[tuple[str, str], int] = {}
    firsts: dict[tuple[str, str], AlertView] = {}
    for alert in alerts:
        key = (alert.rule_name, group_label(alert))
        counts[key] = counts.get(key, 0) + 1
        # The list is in display order, so the first seen is the strongest.
        firsts.setdefault(key, alert)
    # Dicts keep insertion order: rows come out strongest first too.
    rows = tuple(
        SummaryRow(rule_name=rule, rule_kind=first.rule_kind, group=group,
                   count=counts[(rule, group)], strongest=first)
        for (rule, group), first in firsts.items()
    )
    rules = dict.fromkeys(alert.rule_name for alert in alerts)
    links = tuple((rule, pages_filter(rule, opened=opened, state=state)) for rule in rules)
    return AlertList(shown=tuple(alerts[:limit]), total=len(alerts), rows=rows, links=links)


def shortened_line(lists: Sequence[tuple[str, AlertList]], *, charts_left_out: int = 0,
                   max_email_bytes: int | None = None, pages: str = "index.html") -> str:
    """The digest's "Shortened:" line: what the email leaves out and where it is.

    Parameters
    ----------
    lists : sequence of (str, AlertList)
        Each list with the words naming it ("new alerts", "still open", ...).
    charts_left_out : int
        Charts of alerts shown in full that were left out to keep the email small.
    max_email_bytes : int, optional
        The size the email was kept under, named when charts were left out.
    pages : str
        Where the full lists are: the history pages' index (path or address).

    Returns
    -------
    str
        "" when nothing was left out.
    """
    parts = [f"{summary.more:,} of {summary.total:,} {name}"
             for name, summary in lists if summary.summarised]
    if not parts and not charts_left_out:
        return ""
    line = "Shortened:"
    if parts:
        line += " not shown in full: " + ", ".join(parts) + " (each list's table by rule and "
        line += "group counts them all)"
    if charts_left_out:
        size = (f" to keep the email under {max_email_bytes / 1e6:.1f} MB"
                if max_email_bytes else "")
        line += ("; " if parts else " ") + (
            f"{charts_left_out} chart{'s' if charts_left_out != 1 else ''} left out{size}")
    return line + f". Every alert is listed on the history pages ({pages})."


__all__ = [
    "NO_GROUP",
    "SCREENFUL",
    "AlertList",
    "SummaryRow",
    "group_label",
    "pages_filter",
    "shortened_line",
    "summarise",
]
