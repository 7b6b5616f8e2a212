"""The desk's calendar: which dates are run dates, and the `[schedule]` settings.

Pure: no clock, no disk except the holidays file named in the settings, no scheduling
library. Every caller that asks "is this a business day?" or "which run dates were missed?"
(the daily run's catch-up, the scheduler's trigger, the data-feed check) asks here, so the
configured days and holidays are honoured everywhere alike.
"""

from __future__ import annotations

import datetime as dt
import difflib
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from monitor.errors import ComoveError, ConfigError

UTC = dt.UTC


DAY_NAMES: tuple[str, ...] = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
"""Three-letter day names in `datetime.date.weekday()` order (Monday is 0)."""


DEFAULT_DAYS: tuple[str, ...] = DAY_NAMES[:5]


DEFAULT_TIME = dt.time(18, 30)


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


def require_aware(moment: dt.datetime, name: str) -> dt.datetime:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ComoveError(f"{name}: {moment.isoformat()} has no time zone; give an aware datetime")
    return moment


def as_of_for(fire_time: dt.datetime, schedule: Schedule) -> dt.date:
    """The as-of date of a run: the fire time's local date in the schedule's zone.

    Raises
    ------
    ComoveError
        `fire_time` is naive.
    """
    return require_aware(fire_time, "fire_time").astimezone(schedule.zone).date()


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


def run_dates_ending(schedule: Schedule, end: dt.date, count: int) -> list[dt.date]:
    """The `count` run dates of `schedule` up to and including `end`, increasing.

    Raises
    ------
    ConfigError
        `count` below 0.
    """
    if count < 0:
        raise ConfigError(f"count: {count!r} is not a number of days >= 0")
    days: list[dt.date] = []
    day = end
    while len(days) < count:
        if schedule.is_run_date(day):
            days.append(day)
        day -= dt.timedelta(days=1)
    return days[::-1]
