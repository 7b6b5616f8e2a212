"""The alert lifecycle: a vectorised state machine from daily conditions to alert events.

For every rule the :class:`AlertBook` keeps, per target (P_rule,), a breach streak, whether
an alert is open, when it opened and first breached, its peak and its last reminder. Each
business day :meth:`AlertBook.step` takes the rule's :class:`~monitor.rules.Condition` and
emits events only where something happens:

``opened``
    the streak of consecutive breach days reaches the rule's ``hold``; the alert's opened
    date is that day and it also records the streak's first breach date.
``continuing``
    a reminder, every ``remind_every`` evaluated days after the opening (or the previous
    reminder) while the alert is open and not acknowledged; an alert that opened while
    muted is reminded on the first day it is neither muted nor acknowledged. There is no
    daily ``continuing`` event: the book keeps the peak and last values instead.
``cleared``
    the condition's ``clear`` holds while the alert is open. A later breach starts a new
    streak and, at ``hold``, a new alert with a new opened date.

Days without a value (``known`` False) change nothing: an open alert stays open and a
streak neither grows nor breaks. "Days" are evaluated business days, i.e. calls to
``step`` for that rule. Muted targets are recorded like any other, their events carry
``announce = False``. Acknowledgement stops reminders without closing the alert.

An alert is identified by ``(rule name, target label, opened date)``, which a rerun over
the same days reproduces exactly. :meth:`AlertBook.snapshot` exports the state as plain
lists (JSON-ready) keyed by target label, and :meth:`AlertBook.restore` resumes from it,
so a daily run continues where the previous one stopped and gives the same events as a
full replay. Only targets with a streak or an open alert are stored. Open alerts of
targets a changed configuration no longer watches are listed in :attr:`AlertBook.dropped`
and those of a removed rule are returned by :meth:`AlertBook.forget`, so the pipeline can
close them in the store.

Per step the work over all P_rule targets is one ``flatnonzero`` of the breach mask;
everything else touches only the targets with a streak, an open alert or a breach today.
"""

from __future__ import annotations

import datetime
import functools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal, NamedTuple

import numpy as np
import numpy.typing as npt

from monitor._typing import Severity
from monitor.rules.base import Rule
from monitor.rules.inputs import Condition
from monitor.rules.stats import two_sided_p

EventKind = Literal["opened", "continuing", "cleared"]
BoolArray = npt.NDArray[np.bool_]
IntArray = npt.NDArray[np.int64]

SNAPSHOT_FORMAT = 1


class AlertKey(NamedTuple):
    """Stable identity of one alert across reruns."""

    rule: str
    target: str
    opened: datetime.date


@dataclass(frozen=True, slots=True)
class AlertEvent:
    """Something that happened to one alert on one day.

    Attributes
    ----------
    event : {"opened", "continuing", "cleared"}
        What happened; ``continuing`` events are reminders.
    rule, rule_kind, severity : str
        The rule's name, kind and severity.
    target : str
        Target label (``"A/B"``, group name or symbol).
    symbols : tuple of int
        Column indices of the instruments the target concerns.
    date : datetime.date
        The day of the event.
    opened, first_breach : datetime.date
        The day the alert opened (reached ``hold``) and the first day of its streak.
    value, level, low, high, n, z, p, reference : float
        The condition's figures that day (NaN where not relevant); for a reminder on a day
        without a value, ``value`` is the last known one.
    peak_value : float
        Value on the day furthest beyond the level since the first breach.
    peak_date : datetime.date
        That day.
    days_held : int
        Evaluated days from the first breach to this day, both included.
    announce : bool
        False when the target was muted: recorded, not sent.
    reminder : bool
        True for reminders (``continuing`` events).
    """

    event: EventKind
    rule: str
    rule_kind: str
    severity: Severity
    target: str
    symbols: tuple[int, ...]
    date: datetime.date
    opened: datetime.date
    first_breach: datetime.date
    value: float
    level: float
    low: float
    high: float
    n: float
    z: float
    p: float
    reference: float
    peak_value: float
    peak_date: datetime.date
    days_held: int
    announce: bool
    reminder: bool

    @property
    def key(self) -> AlertKey:
        """``(rule, target, opened)``."""
        return AlertKey(self.rule, self.target, self.opened)


@dataclass(frozen=True)
class OpenAlert:
    """An alert open after the last step, for the pipeline's acknowledgement lookup."""

    key: AlertKey
    index: int
    first_breach: datetime.date
    peak_value: float
    peak_date: datetime.date
    last_value: float
    announced: bool


_INT_COLUMNS = ("streak", "first_step", "opened_step", "notice_step")
_DATE_COLUMNS = ("first_date", "opened_date", "peak_date")
_FLOAT_COLUMNS = ("peak_excess", "peak_value", "last_value")
_BOOL_COLUMNS = ("is_open", "announced")


class _RuleState:
    """Dense per-target arrays of one rule plus the sorted indices that are active."""

    def __init__(self, labels: Sequence[str]) -> None:
        size = len(labels)
        self.labels = labels
        self.size = size
        self.steps = 0
        self.last_date: int | None = None
        self.active: IntArray = np.empty(0, dtype=np.int64)
        self.columns: dict[str, npt.NDArray[Any]] = {}
        for name in _INT_COLUMNS + _DATE_COLUMNS:
            self.columns[name] = np.zeros(size, dtype=np.int64)
        for name in _FLOAT_COLUMNS:
            self.columns[name] = np.full(size, np.nan)
        for name in _BOOL_COLUMNS:
            self.columns[name] = np.zeros(size, dtype=bool)

    def __getitem__(self, name: str) -> npt.NDArray[Any]:
        return self.columns[name]


@functools.lru_cache(maxsize=4096)
def _date(ordinal: int) -> datetime.date:
    # Cached: a busy day's events share a handful of opened / first-breach dates.
    return datetime.date.fromordinal(int(ordinal))


def _plain_float(value: float) -> float | None:
    return None if math.isnan(value) else value


def _mask(mask: npt.ArrayLike | None, size: int, name: str) -> BoolArray:
    if mask is None:
        return np.zeros(size, dtype=bool)
    array = np.asarray(mask, dtype=bool)
    if array.shape != (size,):
        raise ValueError(f"{name} mask has shape {array.shape}, expected ({size},)")
    return array


class AlertBook:
    """Alert state of every rule, advanced one business day at a time."""

    def __init__(self) -> None:
        self._states: dict[str, _RuleState] = {}
        self._pending: dict[str, dict[str, Any]] = {}
        self._dropped: list[AlertKey] = []

    @property
    def dropped(self) -> list[AlertKey]:
        """Open alerts left behind on restore because their rule no longer watches the target.

        They will never clear on their own; the pipeline closes them in the store.
        """
        return list(self._dropped)

    def forget(self, rule_name: str) -> list[AlertKey]:
        """Drop a rule the configuration no longer has; return its open alerts' keys."""
        saved = self._pending.pop(rule_name, None)
        state = self._states.pop(rule_name, None)
        if state is not None:
            rows = state.active[state["is_open"][state.active]]
            return [
                AlertKey(rule_name, state.labels[k], _date(state["opened_date"][k]))
                for k in rows.tolist()
            ]
        if saved is None:
            return []
        return [
            AlertKey(rule_name, label, datetime.date.fromisoformat(opened))
            for label, is_open, opened in zip(
                saved["target"], saved["is_open"], saved["opened_date"], strict=True
            )
            if is_open
        ]

    # --- state ------------------------------------------------------------------------

    def _state(self, rule: Rule) -> _RuleState:
        size = len(rule.targets)
        state = self._states.get(rule.name)
        if state is not None:
            if state.size != size:
                raise ValueError(
                    f"rule {rule.name!r} now has {size} targets, the book holds {state.size}"
                )
            return state
        state = _RuleState(rule.targets.labels)
        saved = self._pending.pop(rule.name, None)
        if saved is not None:
            self._load(state, rule, saved)
        self._states[rule.name] = state
        return state

    def _load(self, state: _RuleState, rule: Rule, saved: Mapping[str, Any]) -> None:
        state.steps = int(saved["steps"])
        last = saved["last_date"]
        state.last_date = None if last is None else datetime.date.fromisoformat(last).toordinal()
        positions = [rule.targets.position(label) for label in saved["target"]]
        keep = [k for k, position in enumerate(positions) if position is not None]
        self._dropped += [
            AlertKey(rule.name, label, datetime.date.fromisoformat(saved["opened_date"][k]))
            for k, label in enumerate(saved["target"])
            if positions[k] is None and saved["is_open"][k]
        ]
        rows = np.array([positions[k] for k in keep], dtype=np.int64)
        for name in _INT_COLUMNS:
            state[name][rows] = [int(saved[name][k]) for k in keep]
        for name in _DATE_COLUMNS:
            state[name][rows] = [
                datetime.date.fromisoformat(saved[name][k]).toordinal()
                if saved[name][k] is not None
                else 0
                for k in keep
            ]
        for name in _FLOAT_COLUMNS:
            state[name][rows] = [
                np.nan if saved[name][k] is None else float(saved[name][k]) for k in keep
            ]
        for name in _BOOL_COLUMNS:
            state[name][rows] = [bool(saved[name][k]) for k in keep]
        state.active = np.sort(rows)

    def snapshot(self) -> dict[str, Any]:
        """Export the whole state as plain lists, strings and numbers (JSON-ready).

        Returns
        -------
        dict
            ``{"format": 1, "rules": {name: {"steps", "last_date", "target", <columns>}}}``
            with one list entry per active target (streak or open alert).
        """
        rules: dict[str, Any] = {name: dict(saved) for name, saved in self._pending.items()}
        for name, state in self._states.items():
            rows = state.active
            last = None if state.last_date is None else _date(state.last_date).isoformat()
            saved: dict[str, Any] = {
                "steps": state.steps,
                "last_date": last,
                "target": [state.labels[k] for k in rows.tolist()],
            }
            for column in _INT_COLUMNS:
                saved[column] = [int(v) for v in state[column][rows].tolist()]
            for column in _DATE_COLUMNS:
                saved[column] = [
                    _date(v).isoformat() if v > 0 else None for v in state[column][rows].tolist()
                ]
            for column in _FLOAT_COLUMNS:
                saved[column] = [_plain_float(v) for v in state[column][rows].tolist()]
            for column in _BOOL_COLUMNS:
                saved[column] = [bool(v) for v in state[column][rows].tolist()]
            rules[name] = saved
        return {"format": SNAPSHOT_FORMAT, "rules": rules}

    @classmethod
    def restore(cls, snapshot: Mapping[str, Any]) -> AlertBook:
        """A book that resumes from :meth:`snapshot` output (targets matched by label).

        Raises
        ------
        ValueError
            The snapshot is of an unknown format.
        """
        if snapshot.get("format") != SNAPSHOT_FORMAT:
            raise ValueError(f"alert snapshot format {snapshot.get('format')!r} is not supported")
        book = cls()
        book._pending = {name: dict(saved) for name, saved in snapshot["rules"].items()}
        return book

    def active_targets(self, rule: Rule) -> IntArray:
        """Positions of `rule`'s targets with a streak or an open alert, sorted."""
        return self._state(rule).active.copy()

    # --- the daily step ---------------------------------------------------------------

    def step(
        self,
        rule: Rule,
        condition: Condition,
        date: datetime.date,
        *,
        acknowledged: npt.ArrayLike | None = None,
        muted: npt.ArrayLike | None = None,
    ) -> list[AlertEvent]:
        """Advance one rule by one business day.

        Parameters
        ----------
        rule : Rule
            The rule evaluated; its ``hold`` and ``remind_every`` apply.
        condition : Condition
            ``rule.evaluate(day)``, arrays (P_rule,).
        date : datetime.date
            The day evaluated; must be later than the rule's previous step.
        acknowledged : bool array (P_rule,), optional
            Targets whose open alert is acknowledged (no reminders). Default: none.
        muted : bool array (P_rule,), optional
            Targets whose events are recorded but not announced. Default: none.

        Returns
        -------
        list of AlertEvent
            Sparse: only targets where an alert opened, was reminded or cleared, in target
            order.

        Raises
        ------
        ValueError
            Arrays of the wrong length, or a date not after the previous step.
        """
        state = self._state(rule)
        if len(condition) != state.size:
            raise ValueError(
                f"rule {rule.name!r}: condition has {len(condition)} targets, expected {state.size}"
            )
        ordinal = date.toordinal()
        if state.last_date is not None and ordinal <= state.last_date:
            raise ValueError(
                f"rule {rule.name!r}: {date.isoformat()} is not after the last evaluated day "
                f"{_date(state.last_date).isoformat()}"
            )
        acknowledged_all = _mask(acknowledged, state.size, "acknowledged")
        muted_all = _mask(muted, state.size, "muted")
        state.steps += 1
        state.last_date = ordinal
        now = state.steps

        breached = np.flatnonzero(condition.breach)
        rows = np.union1d(state.active, breached) if state.active.size else breached
        if rows.size == 0:
            return []

        breach = condition.breach[rows]
        clear = condition.clear[rows] & ~breach
        known = condition.known[rows]
        value = condition.value[rows]
        excess = condition.excess[rows]
        was_open = state["is_open"][rows]
        streak = state["streak"][rows]

        # A streak that starts while no alert is open is the start of a candidate alert.
        fresh = breach & (streak == 0) & ~was_open
        streak = np.where(breach, streak + 1, np.where(known, 0, streak))
        state["streak"][rows] = streak
        started = rows[fresh]
        state["first_step"][started] = now
        state["first_date"][started] = ordinal
        state["peak_excess"][started] = excess[fresh]
        state["peak_value"][started] = value[fresh]
        state["peak_date"][started] = ordinal
        higher = (breach | was_open) & ~fresh & (excess > state["peak_excess"][rows])
        grown = rows[higher]
        state["peak_excess"][grown] = excess[higher]
        state["peak_value"][grown] = value[higher]
        state["peak_date"][grown] = ordinal
        state["last_value"][rows[known]] = value[known]

        mute = muted_all[rows]
        opening = ~was_open & breach & (streak >= rule.hold)
        clearing = was_open & clear
        staying = was_open & ~clearing
        if rule.remind_every > 0:
            periodic = now - state["notice_step"][rows] >= rule.remind_every
        else:
            periodic = np.zeros(rows.size, dtype=bool)
        never_told = ~state["announced"][rows] & ~mute
        reminding = staying & ~acknowledged_all[rows] & (periodic | never_told)

        opened = rows[opening]
        state["is_open"][opened] = True
        state["opened_step"][opened] = now
        state["opened_date"][opened] = ordinal
        state["notice_step"][opened] = now
        state["announced"][opened] = ~mute[opening]
        reminded = rows[reminding]
        state["notice_step"][reminded] = now
        state["announced"][reminded] |= ~mute[reminding]

        events = self._events(
            rule, condition, state, rows, (opening, reminding, clearing), date, muted_all
        )

        cleared = rows[clearing]
        state["is_open"][cleared] = False
        state["streak"][cleared] = 0
        state.active = rows[(state["streak"][rows] > 0) | state["is_open"][rows]]
        return events

    def _events(
        self,
        rule: Rule,
        condition: Condition,
        state: _RuleState,
        rows: IntArray,
        changes: tuple[BoolArray, BoolArray, BoolArray],
        date: datetime.date,
        muted: BoolArray,
    ) -> list[AlertEvent]:
        """Build the sparse events; the only per-target Python work of a step.

        Every figure is gathered for all event rows at once and turned into Python scalars
        with ``tolist``, so the loop only assembles records.
        """
        opening, reminding, clearing = changes
        happened = np.flatnonzero(opening | reminding | clearing)
        if happened.size == 0:
            return []
        targets = rows[happened]
        kinds: list[EventKind] = [
            "opened" if o else "cleared" if c else "continuing"
            for o, c in zip(opening[happened].tolist(), clearing[happened].tolist(), strict=True)
        ]
        z = condition.z[targets]
        value = condition.value[targets]
        value = np.where(np.isnan(value) & reminding[happened], state["last_value"][targets], value)
        figures = zip(
            targets.tolist(),
            rule.targets.symbols_for(targets),
            kinds,
            value.tolist(),
            condition.level[targets].tolist(),
            condition.low[targets].tolist(),
            condition.high[targets].tolist(),
            condition.n[targets].tolist(),
            z.tolist(),
            two_sided_p(z).tolist(),
            condition.reference[targets].tolist(),
            state["peak_value"][targets].tolist(),
            state["opened_date"][targets].tolist(),
            state["first_date"][targets].tolist(),
            state["peak_date"][targets].tolist(),
            (state.steps + 1 - state["first_step"][targets]).tolist(),
            (~muted[targets]).tolist(),
            strict=True,
        )
        events: list[AlertEvent] = []
        for (k, symbols, kind, v, level, low, high, n, z_k, p_k, reference, peak, opened, first,
             peak_day, held, announce) in figures:
            events.append(
                AlertEvent(
                    event=kind,
                    rule=rule.name,
                    rule_kind=rule.kind,
                    severity=rule.severity,
                    target=state.labels[k],
                    symbols=symbols,
                    date=date,
                    opened=_date(opened),
                    first_breach=_date(first),
                    value=v,
                    level=level,
                    low=low,
                    high=high,
                    n=n,
                    z=z_k,
                    p=p_k,
                    reference=reference,
                    peak_value=peak,
                    peak_date=_date(peak_day),
                    days_held=held,
                    announce=announce,
                    reminder=kind == "continuing",
                )
            )
        return events

    # --- queries ----------------------------------------------------------------------

    def open_alerts(self, rule: Rule) -> list[OpenAlert]:
        """Alerts of ``rule`` open after its last step, in target order."""
        state = self._state(rule)
        rows = state.active[state["is_open"][state.active]]
        return [
            OpenAlert(
                key=AlertKey(rule.name, state.labels[k], _date(state["opened_date"][k])),
                index=k,
                first_breach=_date(state["first_date"][k]),
                peak_value=float(state["peak_value"][k]),
                peak_date=_date(state["peak_date"][k]),
                last_value=float(state["last_value"][k]),
                announced=bool(state["announced"][k]),
            )
            for k in rows.tolist()
        ]
