"""The scheduling shell of the daily run: when it fires, and the process that fires it.

This module owns the `[schedule]` settings (`Schedule`, `parse_schedule`), the pure
holiday-aware trigger (`HolidayAwareTrigger`, `make_trigger`, `next_fire_times`,
`previous_fire_time`), the run-date calendar used for catch-up (`business_days_between`,
`as_of_for`), the long-running scheduler process (`run_scheduler`) and its logging
(`setup_logging`). It never does the daily work itself: the job is a callable taking the
as-of date, handed in by the caller (the CLI passes `monitor.pipeline.run_daily`).

Time rules, as APScheduler 3.11's `CronTrigger` behaves (checked in tests/test_scheduler.py):

- A time inside the spring-forward gap (02:30 on 2026-03-29 in Europe/Berlin, which does not
  exist) fires on that date at the instant 02:30 would be under the old offset, that is 03:30
  local summer time: the same date, one hour later on the wall clock.
- A time inside the fall-back overlap (02:30 on 2026-10-25 in Europe/Berlin, which happens
  twice) would fire twice under a plain cron trigger; `HolidayAwareTrigger` keeps only the
  first occurrence, so there is at most one run per local date.
"""

from __future__ import annotations

import datetime as dt
import difflib
import logging
import re
import signal
import sys
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from logging.handlers import RotatingFileHandler
from pathlib import Path
from types import FrameType
from typing import Any, TextIO
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from apscheduler.events import (
    EVENT_JOB_ERROR,
    EVENT_JOB_EXECUTED,
    EVENT_JOB_MAX_INSTANCES,
    EVENT_JOB_MISSED,
    EVENT_SCHEDULER_STARTED,
    JobEvent,
)
from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.jobstores.sqlalchemy import SQLAlchemyJobStore
from apscheduler.schedulers import SchedulerNotRunningError
from apscheduler.schedulers.blocking import BlockingScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.cron import CronTrigger

from monitor.errors import ComoveError, ConfigError, JobStoreError

UTC = dt.UTC

DAY_NAMES: tuple[str, ...] = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
"""Three-letter day names in `datetime.date.weekday()` order (Monday is 0)."""

DEFAULT_DAYS: tuple[str, ...] = DAY_NAMES[:5]
DEFAULT_TIME = dt.time(18, 30)

JOB_ID = "comove-daily"
"""Id of the one job in the job store; a restart replaces it instead of adding a second."""

MISFIRE_GRACE = dt.timedelta(hours=6)
"""How late a fire may still run: a scheduler that was asleep or down at 18:30 and is back
by 00:30 still sends that evening's digest; later than that the day is left to the explicit
catch-up (`business_days_between`) rather than surprising the desk overnight. It must stay
below the shortest gap between two fires (23 h across a DST change), so that a late run's
as-of date is never ambiguous."""

LOG_FILE = "comove.log"
LOG_MAX_BYTES = 5 * 1024 * 1024
LOG_BACKUPS = 5

SCHEDULE_KEYS: Mapping[str, tuple[object, str]] = {
    "days": (list(DEFAULT_DAYS), "Days the daily run fires on, as three-letter names mon..sun."),
    "time": ("18:30", "Local time of the daily run, 24-hour HH:MM, in the schedule's zone."),
    "timezone": (None, "IANA time zone of the schedule; defaults to [desk] timezone."),
    "holidays": ([], "Dates (YYYY-MM-DD) on which the daily run does not fire."),
    "holidays_file": (
        None,
        "Text file of holiday dates, one YYYY-MM-DD per line, '#' starts a comment; a "
        "relative path is resolved against the settings file's folder.",
    ),
}
"""Every `[schedule]` key: its default and help text, for the settings documentation."""

_TIME = re.compile(r"^(\d{1,2}):(\d{2})$")
_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


# --------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class Schedule:
    """When the daily run fires.

    Attributes
    ----------
    days : tuple of str
        Three-letter day names ("mon".."sun") the run fires on.
    time : datetime.time
        Local wall time of the run (naive), read in `timezone`.
    timezone : str
        IANA time zone name, e.g. "Europe/Berlin".
    holidays : frozenset of datetime.date
        Local dates on which the run does not fire.
    """

    days: tuple[str, ...] = DEFAULT_DAYS
    time: dt.time = DEFAULT_TIME
    timezone: str = "UTC"
    holidays: frozenset[dt.date] = field(default_factory=frozenset)

    def __post_init__(self) -> None:
        # parse_schedule reports problems with their key paths first; this guards the
        # invariants for a Schedule built directly in code.
        if not self.days:
            raise ConfigError("schedule.days: at least one day is needed")
        for day in self.days:
            if day not in DAY_NAMES:
                raise ConfigError(f"schedule.days: {day!r} is not one of {', '.join(DAY_NAMES)}")
        if self.time.tzinfo is not None:
            raise ConfigError(f"schedule.time: {self.time} carries a zone; give wall time HH:MM")
        _zone(self.timezone, "schedule.timezone")

    @property
    def zone(self) -> ZoneInfo:
        """The schedule's time zone as a `ZoneInfo`."""
        return ZoneInfo(self.timezone)

    def is_run_date(self, day: dt.date) -> bool:
        """True when `day` is a configured weekday and not a holiday."""
        return DAY_NAMES[day.weekday()] in self.days and day not in self.holidays


def _zone(name: object, path: str) -> ZoneInfo:
    if not isinstance(name, str) or not name:
        raise ConfigError(f"{path}: {name!r} is not an IANA time zone name")
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError(
            f"{path}: {name!r} is not an IANA time zone such as 'Europe/Berlin'"
        ) from None


def _parse_days(value: object) -> tuple[str, ...]:
    if isinstance(value, str) or not isinstance(value, list | tuple):
        raise ConfigError(f"schedule.days: {value!r} is not a list of day names such as ['mon']")
    if not value:
        raise ConfigError("schedule.days: [] is empty; at least one day is needed")
    seen: list[str] = []
    for i, item in enumerate(value):
        name = item.strip().lower() if isinstance(item, str) else item
        if name not in DAY_NAMES:
            raise ConfigError(f"schedule.days[{i}]: {item!r} is not one of {', '.join(DAY_NAMES)}")
        if name in seen:
            raise ConfigError(f"schedule.days[{i}]: {item!r} is listed twice")
        seen.append(name)
    return tuple(sorted(seen, key=DAY_NAMES.index))


def _parse_time(value: object) -> dt.time:
    if isinstance(value, dt.time):
        # TOML's unquoted local time (time = 18:30:00) arrives already parsed.
        if value.tzinfo is not None:
            raise ConfigError(f"schedule.time: {value} carries a zone; give wall time HH:MM")
        return value
    match = _TIME.match(value) if isinstance(value, str) else None
    if match is None or int(match[1]) > 23 or int(match[2]) > 59:
        raise ConfigError(f"schedule.time: {value!r} is not a time of day HH:MM")
    return dt.time(int(match[1]), int(match[2]))


def _parse_date(value: object, where: str) -> dt.date:
    if isinstance(value, dt.datetime):
        raise ConfigError(f"{where}: {value!r} is a date and time; give a date YYYY-MM-DD")
    if isinstance(value, dt.date):
        return value
    # date.fromisoformat alone also takes '20261224' and week dates; insist on YYYY-MM-DD.
    if isinstance(value, str) and _ISO_DATE.match(value.strip()):
        try:
            return dt.date.fromisoformat(value.strip())
        except ValueError:
            pass
    raise ConfigError(f"{where}: {value!r} is not an ISO date YYYY-MM-DD")


def read_holidays_file(path: Path, *, key: str = "schedule.holidays_file") -> frozenset[dt.date]:
    """Read holiday dates from a text file.

    Parameters
    ----------
    path : Path
        One ISO date (YYYY-MM-DD) per line; blank lines are skipped and '#' starts a comment.
    key : str
        Settings key named in error messages.

    Returns
    -------
    frozenset of datetime.date

    Raises
    ------
    ConfigError
        The file cannot be read, or a line is not a date (message names the file and line).
    """
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{key}: file {str(path)!r} not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{key}: file {str(path)!r} cannot be read: {exc}") from None
    dates = set()
    for number, line in enumerate(text.splitlines(), start=1):
        content = line.split("#", 1)[0].strip()
        if content:
            dates.add(_parse_date(content, f"{key}: {path} line {number}"))
    return frozenset(dates)


def parse_schedule(raw: Mapping[str, Any], *, desk_timezone: str, base_dir: Path) -> Schedule:
    """Validate a `[schedule]` table into a `Schedule`.

    Parameters
    ----------
    raw : Mapping
        The table as read from TOML; every key is optional (see `SCHEDULE_KEYS`). `time` may be
        a string "HH:MM" or an unquoted TOML local time; `holidays` items may be strings or
        TOML dates.
    desk_timezone : str
        The desk's zone, used when `timezone` is not given.
    base_dir : Path
        Folder against which a relative `holidays_file` is resolved.

    Returns
    -------
    Schedule
        Days in Monday-first order; holidays are the union of `holidays` and the file.

    Raises
    ------
    ConfigError
        One-line message naming the key path and the bad value.
    """
    if not isinstance(raw, Mapping):
        raise ConfigError(f"schedule: expected a table, got {raw!r}")
    for key in raw:
        if key not in SCHEDULE_KEYS:
            near = difflib.get_close_matches(str(key), list(SCHEDULE_KEYS), n=1)
            valid = ", ".join(SCHEDULE_KEYS)
            hint = f"did you mean {near[0]!r}?" if near else f"valid keys: {valid}"
            raise ConfigError(f"schedule.{key}: unknown key; {hint}")

    days = _parse_days(raw["days"]) if "days" in raw else DEFAULT_DAYS
    time = _parse_time(raw["time"]) if "time" in raw else DEFAULT_TIME
    if "timezone" in raw:
        _zone(raw["timezone"], "schedule.timezone")
        timezone = raw["timezone"]
    else:
        _zone(desk_timezone, "desk.timezone")
        timezone = desk_timezone

    holidays: set[dt.date] = set()
    listed = raw.get("holidays", [])
    if isinstance(listed, str) or not isinstance(listed, list | tuple):
        raise ConfigError(f"schedule.holidays: {listed!r} is not a list of dates YYYY-MM-DD")
    for i, item in enumerate(listed):
        holidays.add(_parse_date(item, f"schedule.holidays[{i}]"))
    if raw.get("holidays_file") is not None:
        name = raw["holidays_file"]
        if not isinstance(name, str) or not name.strip():
            raise ConfigError(f"schedule.holidays_file: {name!r} is not a file path")
        path = Path(name)
        holidays |= read_holidays_file(path if path.is_absolute() else base_dir / path)

    return Schedule(days=days, time=time, timezone=timezone, holidays=frozenset(holidays))


# --------------------------------------------------------------------------- trigger


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


def _aware(moment: dt.datetime, name: str) -> dt.datetime:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ComoveError(f"{name}: {moment.isoformat()} has no time zone; give an aware datetime")
    return moment


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
    _aware(start, "start")
    if until is not None:
        _aware(until, "until")
    trigger = make_trigger(schedule)
    times: list[dt.datetime] = []
    fire = trigger.get_next_fire_time(None, start)
    while fire is not None and (until is None or fire <= until):
        times.append(fire)
        if count is not None and len(times) >= count:
            break
        fire = trigger.get_next_fire_time(fire, fire)
    return times


def as_of_for(fire_time: dt.datetime, schedule: Schedule) -> dt.date:
    """The as-of date of a run: the fire time's local date in the schedule's zone.

    Raises
    ------
    ComoveError
        `fire_time` is naive.
    """
    return _aware(fire_time, "fire_time").astimezone(schedule.zone).date()


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
    today = _aware(now, "now").astimezone(zone).date()
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


def business_days_between(schedule: Schedule, after: dt.date, through: dt.date) -> list[dt.date]:
    """The scheduled run dates strictly after `after`, up to and including `through`.

    Parameters
    ----------
    schedule : Schedule
    after : datetime.date
        Typically the as-of date of the last completed run.
    through : datetime.date
        Typically today's as-of date.

    Returns
    -------
    list of datetime.date
        Configured weekdays minus holidays, increasing; empty when `through <= after`.
    """
    days = (after + dt.timedelta(days=i) for i in range(1, (through - after).days + 1))
    return [day for day in days if schedule.is_run_date(day)]


# --------------------------------------------------------------------------- the process


@dataclass
class _Registration:
    """What `_run_job` needs in this process; kept out of the job store on purpose."""

    job: Callable[[dt.date], object]
    schedule: Schedule
    uses_schedule_trigger: bool
    logger: logging.Logger
    busy: threading.Lock = field(default_factory=threading.Lock)


_REGISTRY: dict[str, _Registration] = {}


def _run_job(job_id: str = JOB_ID) -> object:
    """The function the job store refers to by name (`monitor.scheduler:_run_job`).

    The stored job holds only this textual reference and `job_id`; the real callable lives in
    the registry of the process that called `run_scheduler`, so no closure is ever pickled and
    a restart picks up whatever job the new process registers.
    """
    registration = _REGISTRY.get(job_id)
    if registration is None:
        raise ComoveError(f"job {job_id!r}: no daily job is registered in this process")
    schedule = registration.schedule
    now = dt.datetime.now(schedule.zone)
    # The run executes within MISFIRE_GRACE of its fire time, which is shorter than the gap
    # between two fires, so the latest fire time at or before now is the one being run.
    fire = previous_fire_time(schedule, now) if registration.uses_schedule_trigger else None
    as_of = as_of_for(fire or now, schedule)
    with registration.busy:
        registration.logger.info("daily run for as-of %s started", as_of)
        result = registration.job(as_of)
        registration.logger.info("daily run for as-of %s finished", as_of)
    return result


def _describe(moment: dt.datetime | None, schedule: Schedule) -> str:
    if moment is None:
        return "none scheduled"
    local = moment.astimezone(schedule.zone)
    return f"{local.isoformat(sep=' ', timespec='minutes')} ({schedule.timezone})"


def _mask_password(url: str) -> str:
    return re.sub(r"(://[^:/@]*:)[^@]*@", r"\1***@", url)


def _open_jobstore(url: str, scheduler: BlockingScheduler) -> SQLAlchemyJobStore:
    try:
        store = SQLAlchemyJobStore(url=url)
        store.start(scheduler, "default")
    except Exception as exc:  # the driver's own error is the useful part of the message
        first_line = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise JobStoreError(
            f"jobstore_url: {_mask_password(url)!r} cannot be opened: {first_line}"
        ) from None
    return store


def _stored_next_run_time(store: SQLAlchemyJobStore, logger: logging.Logger) -> dt.datetime | None:
    try:
        job = store.lookup_job(JOB_ID)
    except Exception as exc:  # an unreadable stored job is replaced, not fatal
        logger.warning("stored job %r could not be read (%s); replacing it", JOB_ID, exc)
        return None
    return None if job is None else job.next_run_time


def carried_over_run_time(
    stored: dt.datetime | None,
    trigger: BaseTrigger,
    now: dt.datetime,
    grace: dt.timedelta = MISFIRE_GRACE,
) -> dt.datetime | None:
    """The stored next run time to keep when a restart happens just after it was missed.

    Parameters
    ----------
    stored : datetime or None
        The next run time the job store held from the previous process.
    trigger : BaseTrigger
        The trigger of the new process.
    now : datetime
        Aware current time.
    grace : timedelta
        How late a run may still happen.

    Returns
    -------
    datetime or None
        `stored` when it is in the past by at most `grace` and still a fire time of `trigger`
        (the schedule did not change), so the missed run happens at once; else None, and the
        next run is computed afresh from `now`.
    """
    if stored is None or stored > now or now - stored > grace:
        return None
    return stored if trigger.get_next_fire_time(None, stored) == stored else None


def run_scheduler(
    schedule: Schedule,
    job: Callable[[dt.date], object],
    *,
    jobstore_url: str,
    on_start: Callable[[dt.datetime | None], None] | None = None,
    logger: logging.Logger | None = None,
    trigger: BaseTrigger | None = None,
) -> None:
    """Run `job(as_of)` on the schedule until SIGINT or SIGTERM; blocks.

    Parameters
    ----------
    schedule : Schedule
        Days, time, zone and holidays of the run.
    job : callable
        Called with the run's as-of date (local date of the fire time in the schedule's zone).
        An exception is logged and the scheduler keeps going for the next fire.
    jobstore_url : str
        SQLAlchemy URL of the persistent job store (a SQLite file beside the store, or the
        desk's PostgreSQL database). It holds one job, `JOB_ID`, replaced at every start.
    on_start : callable, optional
        Called once, when the job is in the job store and before the first wait, with the next
        fire time (None if there is none); an exception from it stops the scheduler and is
        raised.
    logger : logging.Logger, optional
        Defaults to the "comove.scheduler" logger (see `setup_logging`).
    trigger : BaseTrigger, optional
        Replaces the schedule's trigger (tests use a short interval); the as-of date is then
        the local date of the moment the job starts.

    Raises
    ------
    JobStoreError
        The job store cannot be opened.

    Notes
    -----
    The job is stored with `coalesce=True` (missed fires run once), `max_instances=1` and
    `misfire_grace_time` of `MISFIRE_GRACE`. A restart within that grace after a missed fire
    runs the missed day at once (see `carried_over_run_time`); days missed for longer are left
    to the caller's catch-up. Signal handlers are installed only in the main thread; a run in
    progress when the signal comes is allowed to finish before this function returns.
    """
    log = logger or logging.getLogger("comove.scheduler")
    zone = schedule.zone
    fire_trigger = trigger if trigger is not None else make_trigger(schedule)
    scheduler = BlockingScheduler(
        timezone=zone, executors={"default": ThreadPoolExecutor(max_workers=1)}
    )
    store = _open_jobstore(jobstore_url, scheduler)
    scheduler.add_jobstore(store, "default")

    now = dt.datetime.now(zone)
    carried = carried_over_run_time(_stored_next_run_time(store, log), fire_trigger, now)
    next_run = carried or fire_trigger.get_next_fire_time(None, now)
    if carried is not None:
        log.info("run missed at %s happens now", _describe(carried, schedule))
    job_options: dict[str, Any] = {} if next_run is None else {"next_run_time": next_run}
    registration = _Registration(job, schedule, trigger is None, log)
    stopper = _Stopper(scheduler, log)
    previous_handlers: dict[int, Any] = {}
    _REGISTRY[JOB_ID] = registration
    try:
        scheduler.add_job(
            _run_job,
            trigger=fire_trigger,
            id=JOB_ID,
            name="comove daily run",
            kwargs={"job_id": JOB_ID},
            replace_existing=True,
            coalesce=True,
            misfire_grace_time=int(MISFIRE_GRACE.total_seconds()),
            max_instances=1,
            **job_options,
        )
        scheduler.add_listener(
            _event_logger(fire_trigger, schedule, log),
            EVENT_JOB_ERROR | EVENT_JOB_EXECUTED | EVENT_JOB_MISSED | EVENT_JOB_MAX_INSTANCES,
        )
        failures: list[BaseException] = []
        scheduler.add_listener(
            _started_handler(scheduler, schedule, log, stopper, on_start, failures),
            EVENT_SCHEDULER_STARTED,
        )
        previous_handlers = stopper.install()
        if not stopper.requested.is_set():
            scheduler.start()
        if failures:
            raise failures[0]
    finally:
        stopper.restore(previous_handlers)
        if scheduler.running:
            scheduler.shutdown(wait=False)
        else:
            store.shutdown()
        if registration.busy.locked():
            log.info("waiting for the run in progress to finish")
        with registration.busy:
            pass
        if _REGISTRY.get(JOB_ID) is registration:
            del _REGISTRY[JOB_ID]
        log.info("scheduler stopped")


def _started_handler(
    scheduler: BlockingScheduler,
    schedule: Schedule,
    log: logging.Logger,
    stopper: _Stopper,
    on_start: Callable[[dt.datetime | None], None] | None,
    failures: list[BaseException],
) -> Callable[[object], None]:
    """Announce the next run once the job is in the job store (the scheduler adds it at start).

    APScheduler swallows a listener's exceptions, so a failing `on_start` is kept in
    `failures`, the scheduler is stopped and `run_scheduler` raises it after `start` returns.
    """

    def started(event: object) -> None:
        if stopper.requested.is_set():
            # The signal came between the check before start() and now.
            stopper.stop()
            return
        try:
            stored = scheduler.get_job(JOB_ID)
            next_run = None if stored is None else stored.next_run_time
            log.info("next run at %s", _describe(next_run, schedule))
            if on_start is not None:
                on_start(next_run)
        except BaseException as exc:  # re-raised in the caller's thread
            failures.append(exc)
            stopper.stop()

    return started


def _event_logger(
    trigger: BaseTrigger, schedule: Schedule, log: logging.Logger
) -> Callable[[JobEvent], None]:
    """Log the outcome of each fire and the next fire time after it."""

    def next_run(scheduled: dt.datetime | None) -> str:
        # Computed from the trigger the way the scheduler does it, not read back from the job
        # store: a quick job's event can arrive before the scheduler has stored the next time.
        if scheduled is None:
            return "unknown"
        return _describe(trigger.get_next_fire_time(scheduled, dt.datetime.now(UTC)), schedule)

    def listener(event: JobEvent) -> None:
        if event.code == EVENT_JOB_MAX_INSTANCES:
            times = getattr(event, "scheduled_run_times", None) or [None]
            log.warning(
                "run skipped: the previous run is still going; next run at %s",
                next_run(times[-1]),
            )
            return
        # Every other subscribed code comes as a JobExecutionEvent with these attributes.
        scheduled_time = getattr(event, "scheduled_run_time", None)
        scheduled = _describe(scheduled_time, schedule)
        if event.code == EVENT_JOB_ERROR:
            exc = getattr(event, "exception", None)
            log.error(
                "run scheduled at %s failed: %s: %s; next run at %s",
                scheduled,
                type(exc).__name__,
                exc,
                next_run(scheduled_time),
            )
        elif event.code == EVENT_JOB_MISSED:
            log.warning(
                "run scheduled at %s was missed by more than %s; next run at %s",
                scheduled,
                MISFIRE_GRACE,
                next_run(scheduled_time),
            )
        else:
            log.info("next run at %s", next_run(scheduled_time))

    return listener


class _Stopper:
    """SIGINT/SIGTERM handling: ask the scheduler to stop, from a thread of its own.

    The handler runs in the main thread, which may be inside the scheduler's job processing
    holding its locks; shutting down from a helper thread waits for that to finish instead of
    tearing the job store down under it.
    """

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self, scheduler: BlockingScheduler, log: logging.Logger) -> None:
        self.scheduler = scheduler
        self.log = log
        self.requested = threading.Event()
        self._lock = threading.Lock()

    def install(self) -> dict[int, Any]:
        if threading.current_thread() is not threading.main_thread():
            return {}
        previous: dict[int, Any] = {}
        for signum in self.SIGNALS:
            previous[signum] = signal.signal(signum, self._handle)
        return previous

    def restore(self, previous: Mapping[int, Any]) -> None:
        for signum, handler in previous.items():
            signal.signal(signum, handler)

    def _handle(self, signum: int, frame: FrameType | None) -> None:
        if self.requested.is_set():
            return
        self.requested.set()
        self.log.info("received %s; stopping", signal.Signals(signum).name)
        threading.Thread(target=self.stop, name="comove-stop", daemon=True).start()

    def stop(self) -> None:
        with self._lock:
            try:
                self.scheduler.shutdown(wait=False)
            except SchedulerNotRunningError:
                pass


# --------------------------------------------------------------------------- logging


_OUR_HANDLER = "_comove_handler"


def setup_logging(
    log_dir: Path, *, level: int = logging.INFO, stream: TextIO | None = None
) -> logging.Logger:
    """Send comove's log to stderr and to a rotating `comove.log` in `log_dir`.

    Parameters
    ----------
    log_dir : Path
        Folder of the log file (the store's folder); created if missing.
    level : int
        Level of the "comove" logger. APScheduler's own messages are kept at WARNING and above
        (its tracebacks of failed runs go to the same places).
    stream : TextIO, optional
        Where the console copy goes; defaults to `sys.stderr` at call time.

    Returns
    -------
    logging.Logger
        The "comove" logger. Calling again replaces the handlers this function added, so
        there are never duplicate lines.
    """
    log_dir.mkdir(parents=True, exist_ok=True)
    formatter = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    console = logging.StreamHandler(stream if stream is not None else sys.stderr)
    logfile = RotatingFileHandler(
        log_dir / LOG_FILE, maxBytes=LOG_MAX_BYTES, backupCount=LOG_BACKUPS, encoding="utf-8"
    )
    handlers: list[logging.Handler] = [console, logfile]
    for handler in handlers:
        handler.setFormatter(formatter)
        setattr(handler, _OUR_HANDLER, True)

    comove = logging.getLogger("comove")
    targets = ((comove, level), (logging.getLogger("apscheduler"), logging.WARNING))
    previous = {
        h for target, _ in targets for h in target.handlers if getattr(h, _OUR_HANDLER, False)
    }
    for old in previous:
        for target, _ in targets:
            target.removeHandler(old)
        old.close()
    for target, target_level in targets:
        for handler in handlers:
            target.addHandler(handler)
        target.setLevel(target_level)
        # Our handlers are the output; passing records on to the root would print them twice
        # wherever the host also configured logging.
        target.propagate = False
    return comove
