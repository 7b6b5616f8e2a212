"""The context of the history site: every dataclass the pipeline fills and the pages read.

This module owns what the history pages can show, field by field: instruments, the
parameters behind the numbers, alerts, measure histories, alert periods, events,
acknowledgements, driver days, rules, runs, archived digests, and the `SiteContext` that
holds them all. Each dataclass checks its own fields when made (words from a fixed list,
arrays of one length), so rendering never meets a malformed value. Nothing here reads
the store, the clock or the disk: `monitor.pages.build` fills these from the store's
facts, `monitor.pages.render` turns them into files.

Decisions a reader of the code should know:

- Group-average and stale-data alerts get a *target page* of their own (`TargetPage`), laid out
  like a pair page without drivers, rather than only a link to their rule: a reviewer asks
  "what happened to this group" as often as "what did this rule do".
- A rule page lists the alerts of `SiteContext.alerts` with that rule name: the alerts are
  given once and every page that shows them is derived from that one list.
- Sequence fields are turned into tuples (`monitor.templating.tuple_fields`), so the
  pipeline may pass lists and the context is still immutable.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Literal

from monitor._typing import Severity
from monitor.pages.records import (
    ALERT_STATES,
    EVENT_KINDS,
    RUN_KINDS,
    RUN_STATUSES,
    SEVERITIES,
    STATE_LABELS,
    TARGET_KINDS,
    AckView,
    AlertSpan,
    AlertState,
    AlertSummary,
    DigestLink,
    DriverRow,
    DriversView,
    EventKind,
    EventView,
    InstrumentView,
    MeasureHistory,
    RunKind,
    RunStatus,
    RunView,
    SiteParameters,
    TargetKind,
    check_word,
)
from monitor.templating import tuple_fields

__all__ = [
    "ALERT_STATES",
    "AckView",
    "AlertSpan",
    "AlertState",
    "AlertSummary",
    "DigestLink",
    "DriverRow",
    "DriversView",
    "EVENT_KINDS",
    "EventKind",
    "EventView",
    "InstrumentView",
    "MeasureHistory",
    "PairPage",
    "RUN_KINDS",
    "RUN_STATUSES",
    "RulePage",
    "RunKind",
    "RunStatus",
    "RunView",
    "SEVERITIES",
    "STATE_LABELS",
    "SiteContext",
    "SiteParameters",
    "TARGET_KINDS",
    "TargetKind",
    "TargetPage",
]


__all__ = [
    "ALERT_STATES",
    "EVENT_KINDS",
    "RUN_KINDS",
    "RUN_STATUSES",
    "SEVERITIES",
    "STATE_LABELS",
    "TARGET_KINDS",
    "AckView",
    "AlertSpan",
    "AlertState",
    "AlertSummary",
    "DigestLink",
    "DriverRow",
    "DriversView",
    "EventKind",
    "EventView",
    "InstrumentView",
    "MeasureHistory",
    "PairPage",
    "RulePage",
    "RunKind",
    "RunStatus",
    "RunView",
    "SiteContext",
    "SiteParameters",
    "TargetKind",
    "TargetPage",
]


@dataclass(frozen=True)
class PairPage:
    """Everything the page of one monitored pair shows.

    Attributes
    ----------
    a, b : InstrumentView
        The pair, in the order its returns are given in the drivers.
    measures : tuple of MeasureHistory
        One chart and one table of key numbers each.
    spans : tuple of AlertSpan
        Alert periods to shade.
    events : tuple of EventView
        Every event of the pair's alerts (shown by date).
    acknowledgements : tuple of AckView
        Acknowledgements and notes.
    drivers : tuple of DriversView
        Driver days, one entry per alert.
    note : str
        A line above the page's tables ("" for none), e.g. why it carries no charts.
    """

    a: InstrumentView
    b: InstrumentView
    measures: Sequence[MeasureHistory] = ()
    spans: Sequence[AlertSpan] = ()
    events: Sequence[EventView] = ()
    acknowledgements: Sequence[AckView] = ()
    drivers: Sequence[DriversView] = ()
    note: str = ""

    def __post_init__(self) -> None:
        tuple_fields(self, "measures", "spans", "events", "acknowledgements", "drivers")

    @property
    def label(self) -> str:
        """"KLV/DUNQ"."""
        return f"{self.a.symbol}/{self.b.symbol}"


@dataclass(frozen=True)
class TargetPage:
    """The page of a group (group-average rules) or of one instrument (stale-data rules).

    Attributes
    ----------
    kind : {"group", "instrument"}
        What the target is.
    label : str
        The group's name or the instrument's symbol, as in `AlertSummary.target`.
    name : str
        A longer name (the instrument's name, a group's description); "" when none.
    members : tuple of str
        Symbols of a group's instruments; empty for an instrument.
    measures : tuple of MeasureHistory
        Histories to chart (e.g. the group's average correlation); may be empty.
    spans, events, acknowledgements
        As for `PairPage`.
    """

    kind: Literal["group", "instrument"]
    label: str
    name: str = ""
    members: Sequence[str] = ()
    measures: Sequence[MeasureHistory] = ()
    spans: Sequence[AlertSpan] = ()
    events: Sequence[EventView] = ()
    acknowledgements: Sequence[AckView] = ()

    def __post_init__(self) -> None:
        tuple_fields(self, "members", "measures", "spans", "events", "acknowledgements")
        check_word("kind", self.kind, ("group", "instrument"))


@dataclass(frozen=True)
class RulePage:
    """One configured rule.

    Attributes
    ----------
    name : str
        The desk's name for it.
    kind : str
        Its kind ("level", "shift", "group-average", "stale", ...).
    severity : {"critical", "warning", "info"}
        Severity of its alerts.
    measure : str
        Measure spec it watches; "" when none (stale-data rules).
    parameters : tuple of (str, str)
        Its settings as configured, as (key, value) text, in the order to show them.
    description : str
        A line of the desk's own words about it; "" when none.
    method_note : str
        One sentence from the rule (`Rule.method_note`): which variance and which
        false-alarm setting stand behind its alerts; "" for rules on the desk's own levels.

    Notes
    -----
    Its alerts are those of `SiteContext.alerts` with this rule name.
    """

    name: str
    kind: str
    severity: Severity
    measure: str = ""
    parameters: Sequence[tuple[str, str]] = ()
    description: str = ""
    method_note: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "parameters", tuple((str(k), str(v)) for k, v in self.parameters)
        )
        check_word("severity", self.severity, SEVERITIES)


MuteState = Literal["active", "coming", "ended"]


@dataclass(frozen=True)
class MuteView:
    """One mute: a rule or a target whose alerts are recorded but not announced.

    Attributes
    ----------
    id : int
        Mute id (`comove unmute ID` lifts it).
    rule, target : str or None
        What is muted: every alert of a rule, or a target ("A/B", a group, a symbol) under
        every rule; exactly one is set.
    from_on, until : date
        First and last muted day.
    reason : str
        Why, as given with `comove mute --reason`.
    state : {"active", "coming", "ended"}
        Relative to the day the site was built.
    """

    id: int
    rule: str | None
    target: str | None
    from_on: date
    until: date
    reason: str
    state: MuteState

    @property
    def what(self) -> str:
        return f"rule {self.rule}" if self.rule else f"{self.target} under every rule"


@dataclass(frozen=True)
class SiteContext:
    """Everything the history site shows. The pipeline fills it; rendering reads it.

    Attributes
    ----------
    desk : str
        The desk's name, in every page's header.
    generated_at : datetime
        When the site was built, passed in (rendering never reads the clock).
    data_through : date
        Last day with closes in the store.
    version : str
        comove's version.
    parameters : SiteParameters
        Measures, return kind and confidence level, in every footer.
    alerts : tuple of AlertSummary
        Every alert, the one source of every alert table.
    pairs : tuple of PairPage
        One page each; a pair may appear once.
    rules : tuple of RulePage
        The configured rules.
    runs : tuple of RunView
        The runs ledger.
    digests : tuple of DigestLink
        Archived digests.
    groups : mapping of str to str
        Symbol -> group, used for the group filter and to fill `AlertSummary.groups`.
    targets : tuple of TargetPage
        Pages of groups and single instruments watched by group-average and stale-data rules.
    mutes : tuple of MuteView
        Every mute, oldest first.
    """

    desk: str
    generated_at: datetime
    data_through: date
    version: str
    parameters: SiteParameters
    alerts: Sequence[AlertSummary] = ()
    pairs: Sequence[PairPage] = ()
    rules: Sequence[RulePage] = ()
    runs: Sequence[RunView] = ()
    digests: Sequence[DigestLink] = ()
    groups: Mapping[str, str] = field(default_factory=dict)
    targets: Sequence[TargetPage] = ()
    mutes: Sequence[MuteView] = ()

    def __post_init__(self) -> None:
        tuple_fields(self, "alerts", "pairs", "rules", "runs", "digests", "targets", "mutes")
        object.__setattr__(self, "groups", dict(self.groups))
