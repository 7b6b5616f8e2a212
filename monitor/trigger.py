"""The holiday-aware trigger: when the daily run fires, as a pure value object.

`HolidayAwareTrigger` wraps APScheduler's `CronTrigger` (the configured weekdays at the
local time), skips the schedule's holidays and keeps one fire per local date across a
fall-back overlap. Computing the next time does no I/O; the scheduler process
(`monitor.scheduler`) stores and fires it.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.cron import CronTrigger

from monitor.calendar import UTC, Schedule, require_aware
from monitor.errors import ComoveError


class HolidayAwareTrigger(BaseTrigger):
    """A cron trigger that skips holidays and fires at most once per local date.

    A pure value object: computing a fire time does no I/O and does not read the clock. It is
    pickled into the job store, so it holds only the cron trigger and the holiday dates.

    Parameters
    ----------
    cron : CronTrigger
        The weekday/time rule, with its time zone set.
    holidays : frozenset of datetime.date
        Local dates (in the cron trigger's zone) on which no fire happens.
    """

    __slots__ = ("cron", "holidays")

    def __init__(self, cron: CronTrigger, holidays: frozenset[dt.date]) -> None:
        self.cron = cron
        self.holidays = frozenset(holidays)

    @property
    def timezone(self) -> dt.tzinfo:
        """The zone the fire times are expressed in."""
        zone: dt.tzinfo = self.cron.timezone
        return zone

    def get_next_fire_time(
        self, previous_fire_time: dt.datetime | None, now: dt.datetime
    ) -> dt.datetime | None:
        """The first cron fire time after `previous_fire_time` (or at/after `now`) that is allowed.

        Parameters
        ----------
        previous_fire_time : datetime or None
            The last fire time (aware), None when the trigger has not fired yet.
        now : datetime
            The current time (aware).

        Returns
        -------
        datetime or None
            Aware, in the trigger's zone with the real UTC offset of that instant; None only
            when the cron trigger itself has no further fire times.
        """
        zone = self.timezone
        last_date = previous_fire_time.astimezone(zone).date() if previous_fire_time else None
        candidate = self.cron.get_next_fire_time(previous_fire_time, now)
        # Each skip passes a holiday or the second occurrence of a fall-back hour, and the cron
        # rule fires at most twice on one local date, so this bound is never reached.
        for _ in range(2 * len(self.holidays) + 4):
            if candidate is None:
                return None
            # A fire time in the spring-forward gap comes back with the pre-change offset;
            # going through UTC (astimezone to the same zone object is a no-op) gives the
            # wall time the run really happens at.
            local = candidate.astimezone(UTC).astimezone(zone)
            if local.date() not in self.holidays and local.date() != last_date:
                return local
            candidate = self.cron.get_next_fire_time(candidate, candidate)
        raise RuntimeError(f"no allowed fire time found after {candidate}")  # pragma: no cover

    def __getstate__(self) -> dict[str, object]:
        return {"version": 1, "cron": self.cron, "holidays": sorted(self.holidays)}

    def __setstate__(self, state: dict[str, Any]) -> None:
        if state.get("version", 1) > 1:
            raise ValueError(f"HolidayAwareTrigger state version {state['version']} is too new")
        self.cron = state["cron"]
        self.holidays = frozenset(state["holidays"])

    def __str__(self) -> str:
        return f"{self.cron} minus {len(self.holidays)} holidays"

    def __repr__(self) -> str:
        return f"<HolidayAwareTrigger ({self.cron!r}, holidays={len(self.holidays)})>"


def make_trigger(schedule: Schedule) -> HolidayAwareTrigger:
    """The trigger of a schedule: its weekdays at its local time, holidays skipped.

    Parameters
    ----------
    schedule : Schedule

    Returns
    -------
    HolidayAwareTrigger
        Wraps a `CronTrigger(day_of_week=..., hour=..., minute=..., second=...)` in the
        schedule's zone.
    """
    cron = CronTrigger(
        day_of_week=",".join(schedule.days),
        hour=schedule.time.hour,
        minute=schedule.time.minute,
        second=schedule.time.second,
        timezone=schedule.zone,
    )
    return HolidayAwareTrigger(cron, schedule.holidays)


def next_fire_times(
    schedule: Schedule,
    start: dt.datetime,
    *,
    count: int | None = None,
    until: dt.datetime | None = None,
) -> list[dt.datetime]:
    """The schedule's fire times from `start` on.

    Parameters
    ----------
    schedule : Schedule
    start : datetime
        Aware; a fire time equal to `start` is included.
    count : int, optional
        Stop after this many fire times.
    until : datetime, optional
        Aware; stop at the last fire time at or before it.

    Returns
    -------
    list of datetime
        Aware, in the schedule's zone, increasing; at least one of `count` and `until` bounds it.

    Raises
    ------
    ComoveError
        Neither bound given, `count` below 1, or a naive datetime.
    """
    if count is None and until is None:
        raise ComoveError("next_fire_times: give count or until")
    if count is not None and count < 1:
        raise ComoveError(f"count: {count!r} is not a number of fire times >= 1")
    require_aware(start, "start")
    if until is not None:
        require_aware(until, "until")
    trigger = make_trigger(schedule)
    times: list[dt.datetime] = []
    fire = trigger.get_next_fire_time(None, start)
    while fire is not None and (until is None or fire <= until):
        times.append(fire)
        if count is not None and len(times) >= count:
            break
        fire = trigger.get_next_fire_time(fire, fire)
    return times


def previous_fire_time(schedule: Schedule, now: dt.datetime) -> dt.datetime | None:
    """The schedule's latest fire time at or before `now`.

    Parameters
    ----------
    schedule : Schedule
    now : datetime
        Aware.

    Returns
    -------
    datetime or None
        Aware, in the schedule's zone; None when no fire time falls in the searched span
        (one week more than the holidays could blank out), which a valid schedule never gives.
    """
    zone = schedule.zone
    trigger = make_trigger(schedule)
    today = require_aware(now, "now").astimezone(zone).date()
    for back in range(7 * (len(schedule.holidays) + 2)):
        day = today - dt.timedelta(days=back)
        if not schedule.is_run_date(day):
            continue
        # Midnight may not exist where a zone changes at 00:00; the pre-change offset then
        # still names the start of that day, which is all the search needs.
        fire = trigger.get_next_fire_time(None, dt.datetime.combine(day, dt.time(0), zone))
        if fire is not None and fire <= now and fire.date() == day:
            return fire
    return None
