"""Replaying the rules over the returns history, one business day at a time.

Pure: numpy arrays, rules and an alert book in; per-day alert events out. The pipeline
reads the store, calls :func:`replay`, and persists what it yields; nothing here touches
the store, the clock or the disk.

A replay runs the engine once per measure the rules read (as per-pair streams over the
union of the rules' pairs), keeps a short ring buffer of earlier days for rules that
look back (``jump``, the ``adjacent`` shift test), builds one :class:`DayInputs` per day
and steps every rule's alerts. Because the engine's results from any start row equal a
full pass (its warm-up reaches back as needed), resuming from a saved alert book at row
``t`` gives exactly the events a replay from row 0 gives from ``t`` on.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import functools
import hashlib
import json
import queue
import threading
from collections import deque
from collections.abc import Callable, Generator, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from monitor.alerts.book import AlertBook, AlertEvent
from monitor.engine.pairdates import OwnHistory, stream_on_pair_dates
from monitor.rules import Condition, DayInputs, MeasureDay, PairLayout, Rule
from monitor.rules.registry import lags_needed, measures_needed, pairs_needed

BoolArray = npt.NDArray[np.bool_]


@dataclass(frozen=True)
class Mute:
    """A mute as the replay sees it: a rule (or None: any rule) and a target label (or
    None: every target), from one date to another, both included."""

    rule: str | None
    target: str | None
    from_on: dt.date
    until: dt.date


@dataclass(frozen=True)
class Plan:
    """What a replay computes: rules, the instruments, the pair union and the measures."""

    rules: tuple[Rule, ...]
    symbols: tuple[str, ...]
    pairs: npt.NDArray[np.int64]
    layout: PairLayout
    measures: tuple[str, ...]
    lags: tuple[tuple[str, int], ...]
    level: float

    @property
    def max_lag(self) -> int:
        return max((lag for _, lag in self.lags), default=0)

    @property
    def history_rows(self) -> int:
        """Rows of standardised returns the rules read (0: none)."""
        return max((rule.history_rows() for rule in self.rules), default=0)

    @property
    def rule_names(self) -> tuple[str, ...]:
        return tuple(rule.name for rule in self.rules)


def make_plan(rules: Sequence[Rule], symbols: Sequence[str], *, level: float) -> Plan:
    pairs = pairs_needed(rules, len(symbols))
    return Plan(
        rules=tuple(rules), symbols=tuple(symbols), pairs=pairs,
        layout=PairLayout(pairs, len(symbols)), measures=tuple(measures_needed(rules)),
        lags=tuple(lags_needed(rules)), level=level,
    )


def scope_hash(parts: Mapping[str, Any]) -> str:
    """A stable hash of everything that decides a replay's results (rules, returns, level,
    symbols): saved state is only reused under the same hash."""
    text = json.dumps(parts, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


@dataclass
class DayEvents:
    """The events of one evaluated business day."""

    t: int
    date: dt.date
    events: list[AlertEvent] = field(default_factory=list)


AckLookup = Callable[[Rule, dt.date], BoolArray | None]


_DONE = object()


def prefetch(items: Iterator[Any], depth: int = 16) -> Generator[Any, None, None]:
    """Run `items` in a background thread, `depth` items ahead of the consumer.

    The engine's numpy work releases the GIL, so on a machine with two cores the next
    days' correlations are computed while the rules and the alert book handle today's.
    Results are the same objects in the same order; an error in the producer is raised
    in the consumer.
    """
    buffer: queue.Queue[Any] = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def produce() -> None:
        try:
            for item in items:
                while not stop.is_set():
                    try:
                        buffer.put(item, timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            buffer.put(_DONE)
        except BaseException as exc:  # handed to the consumer, who raises it
            buffer.put(exc)

    worker = threading.Thread(target=produce, name="comove-engine", daemon=True)
    worker.start()
    try:
        while True:
            item = buffer.get()
            if item is _DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        worker.join(timeout=5)


def _days(streams: Mapping[str, Iterator[Any]]) -> Iterator[dict[str, Any]]:
    """One dict of every measure's result per day, from the per-measure streams."""
    while True:
        day: dict[str, Any] = {}
        for text, results in streams.items():
            item = next(results, None)
            if item is None:
                return
            day[text] = item
        yield day


RemoteConditions = Callable[[Rule, int], Condition]
"""A rule's condition on row t computed elsewhere (the tiles of a distributed backfill)."""


def day_inputs(
    returns: np.ndarray,
    dates: Sequence[dt.date],
    plan: Plan,
    *,
    from_t: int,
    stop_t: int,
    days_without_close: np.ndarray | None = None,
    days_unchanged: np.ndarray | None = None,
) -> Iterator[tuple[int, DayInputs | None]]:
    """Rows ``from_t .. stop_t-1`` with the :class:`DayInputs` the rules of `plan` read
    (None when `plan` has no rules: nothing is computed)."""
    if not plan.rules:
        for t in range(from_t, stop_t):
            yield t, None
        return
    warm_t = max(0, from_t - plan.max_lag)
    # Every pair on its own dates (monitor.engine.pairdates): the values `series` shows.
    streams = {
        text: stream_on_pair_dates(returns, text, plan.pairs, start=warm_t, stop=stop_t,
                                   level=plan.level)
        for text in plan.measures
    }
    history: dict[str, deque[Any]] = {
        text: deque(maxlen=plan.max_lag + 1) for text in plan.measures
    }
    rows = plan.history_rows
    # Standardised on each instrument's own dates, computed on the whole matrix: each value
    # depends only on its trailing own rows, so every start row sees the same numbers.
    own = OwnHistory(returns[:stop_t]) if rows else None
    # Closed on every way out, so the engine thread never outlives the replay.
    with contextlib.closing(prefetch(_days(streams))) as computed:
        for t in range(warm_t, stop_t):
            today: dict[str, Any] = {}
            results = next(computed)
            for text in streams:
                # The engine's day result goes to the rules as it is: its band is computed
                # only when a rule reads it. Each day is a fresh array, so earlier days held
                # for look-backs stay valid.
                day = results[text]
                history[text].append(day)
                today[text] = day
            if t < from_t:
                continue
            lagged = {}
            for text, lag in plan.lags:
                past = history[text]
                lagged[(text, lag)] = (past[-1 - lag] if len(past) > lag
                                       else MeasureDay.missing(len(plan.pairs)))
            yield t, DayInputs(
                date=dates[t], measures=today, layout=plan.layout, lagged=lagged,
                days_without_close=None if days_without_close is None else days_without_close[t],
                days_unchanged=None if days_unchanged is None else days_unchanged[t],
                scaled_history=None if own is None else own.instruments(t, rows),
                scaled_pairs=None if own is None else functools.partial(own.pairs, t, rows),
            )


def replay(
    returns: np.ndarray,
    dates: Sequence[dt.date],
    plan: Plan,
    book: AlertBook,
    *,
    from_t: int = 0,
    stop_t: int | None = None,
    days_without_close: np.ndarray | None = None,
    days_unchanged: np.ndarray | None = None,
    mutes: Sequence[Mute] = (),
    acknowledged: AckLookup | None = None,
    remote: tuple[frozenset[str], RemoteConditions] | None = None,
) -> Iterator[DayEvents]:
    """Step every rule of `plan` over rows `from_t .. stop_t-1` of `returns` (T, N).

    `book` must hold the state after row `from_t - 1` (a new book for `from_t` = 0).
    `acknowledged(rule, date)` returns the mask of the rule's targets whose open alert is
    acknowledged on that date, or None for none. `remote` names the rules whose conditions
    were computed elsewhere and the lookup that gives them (a distributed backfill); the
    other rules are evaluated here. Yields one DayEvents per row.
    """
    stop_t = returns.shape[0] if stop_t is None else stop_t
    names, lookup = remote if remote is not None else (frozenset(), None)
    local = plan if not names else make_plan(
        [rule for rule in plan.rules if rule.name not in names], plan.symbols, level=plan.level)
    for t, inputs in day_inputs(returns, dates, local, from_t=from_t, stop_t=stop_t,
                                days_without_close=days_without_close,
                                days_unchanged=days_unchanged):
        date = dates[t]
        out = DayEvents(t, date)
        for rule in plan.rules:
            if lookup is not None and rule.name in names:
                condition = lookup(rule, t)
            else:
                assert inputs is not None
                condition = rule.evaluate(inputs)
            muted = _muted(rule, date, mutes)
            acked = acknowledged(rule, date) if acknowledged is not None else None
            out.events.extend(book.step(rule, condition, date, acknowledged=acked, muted=muted))
        yield out


def _muted(rule: Rule, date: dt.date, mutes: Sequence[Mute]) -> BoolArray | None:
    active = [m for m in mutes if m.from_on <= date <= m.until
              and (m.rule is None or m.rule == rule.name)]
    if not active:
        return None
    if any(m.target is None for m in active):
        return np.ones(len(rule.targets), dtype=bool)
    return rule.targets.mask(m.target for m in active if m.target is not None)
