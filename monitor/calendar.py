"""The desk's calendar: which dates are run dates, and the `[schedule]` settings.

Pure: no clock, no disk except the holidays file named in the settings (and the session
tables shipped inside the exchange_calendars package), no scheduling library. Every caller
that asks "is this a business day?" or "which run dates were missed?" (the daily run's
catch-up, the scheduler's trigger, the data-feed check) asks here, so the
configured days and holidays are honoured everywhere alike.
"""

from __future__ import annotations

import datetime as dt
import difflib
import functools
import re
import warnings
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from monitor.config_tables import summarise_problems
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
    "calendar": (
        None,
        "Exchange calendar code (as the exchange_calendars package names it, e.g. 'XNYS' or "
        "'XLON'): its holidays are added to `holidays`, within the years the package "
        "covers (about twenty back, one ahead).",
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
    problems: list[str] = []

    def read(key: str, parse: Any, default: Any) -> Any:
        if key not in raw:
            return default
        try:
            return parse(raw[key])
        except ConfigError as exc:
            problems.append(str(exc))
            return default

    for key in raw:
        if key not in SCHEDULE_KEYS:
            near = difflib.get_close_matches(str(key), list(SCHEDULE_KEYS), n=1)
            valid = ", ".join(SCHEDULE_KEYS)
            hint = f"did you mean {near[0]!r}?" if near else f"valid keys: {valid}"
            problems.append(f"schedule.{key}: unknown key; {hint}")

    days = read("days", _parse_days, DEFAULT_DAYS)
    time = read("time", _parse_time, DEFAULT_TIME)
    timezone = desk_timezone
    zone_key = "schedule.timezone" if "timezone" in raw else "desk.timezone"
    try:
        _zone(raw.get("timezone", desk_timezone), zone_key)
        timezone = raw.get("timezone", desk_timezone)
    except ConfigError as exc:
        problems.append(str(exc))
        timezone = "UTC"
    holidays = read("holidays", _parse_holiday_list, frozenset())
    if raw.get("holidays_file") is not None:
        holidays = holidays | read("holidays_file", lambda name: _read_named_file(name, base_dir),
                                   frozenset())
    if raw.get("calendar") is not None:
        code = read("calendar", lambda code: check_exchange_code(code, "schedule.calendar"), None)
        if code is not None:
            holidays = holidays | exchange_holidays(code, days)
    if problems:
        raise ConfigError(summarise_problems(problems), problems)
    return Schedule(days=days, time=time, timezone=timezone, holidays=frozenset(holidays))


def _parse_holiday_list(listed: object) -> frozenset[dt.date]:
    if isinstance(listed, str) or not isinstance(listed, list | tuple):
        raise ConfigError(f"schedule.holidays: {listed!r} is not a list of dates YYYY-MM-DD")
    return frozenset(_parse_date(item, f"schedule.holidays[{i}]") for i, item in enumerate(listed))


def _read_named_file(name: object, base_dir: Path) -> frozenset[dt.date]:
    if not isinstance(name, str) or not name.strip():
        raise ConfigError(f"schedule.holidays_file: {name!r} is not a file path")
    path = Path(name)
    return read_holidays_file(path if path.is_absolute() else base_dir / path)


# --- exchange calendars ------------------------------------------------------------------
# The exchange_calendars package knows the sessions of about a hundred exchanges, by their
# ISO 10383 market identifier codes (and a few aliases). It is imported only when a code is
# used (the import takes about half a second), and its own deprecation warnings are kept
# out of comove's output.


@contextmanager
def _quiet() -> Iterator[None]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


@functools.cache
def exchange_codes() -> tuple[str, ...]:
    """Every exchange calendar code the installed exchange_calendars package knows."""
    with _quiet():
        import exchange_calendars

        return tuple(sorted(exchange_calendars.get_calendar_names(include_aliases=True)))


def code_hint(code: str) -> str:
    """'close matches: ...' naming up to four known codes nearest to `code`, or examples."""
    codes = exchange_codes()
    near = difflib.get_close_matches(code.upper(), codes, n=4, cutoff=0.5)
    if near:
        return "close matches: " + ", ".join(near)
    return "codes look like XNYS, XLON, XTKS"


def check_exchange_code(code: object, key: str) -> str:
    """Return `code` when it names an exchange calendar, else a one-line ConfigError
    listing the close matches."""
    if not isinstance(code, str) or not code.strip():
        raise ConfigError(f"{key}: {code!r} is not an exchange calendar code such as 'XNYS'")
    if code in exchange_codes():
        return code
    raise ConfigError(f"{key}: {code!r} is not an exchange calendar code; {code_hint(code)}")


@functools.cache
def _sessions(code: str) -> tuple[frozenset[dt.date], dt.date, dt.date]:
    """The calendar's session dates and the first and last date it covers."""
    with _quiet():
        import exchange_calendars

        calendar = exchange_calendars.get_calendar(code)
        sessions = frozenset(day.date() for day in calendar.sessions)
        return sessions, calendar.first_session.date(), calendar.last_session.date()


def exchange_holidays(code: str, days: tuple[str, ...] = DEFAULT_DAYS) -> frozenset[dt.date]:
    """Dates on the given weekdays, within the calendar's span, with no session."""
    sessions, first, last = _sessions(code)
    wanted = {DAY_NAMES.index(day) for day in days}
    span = (first + dt.timedelta(days=i) for i in range((last - first).days + 1))
    return frozenset(day for day in span if day.weekday() in wanted and day not in sessions)


def exchange_open(code: str, day: dt.date) -> bool:
    """True when the exchange has a session on `day`; outside the calendar's span, a
    weekday counts as open (nothing is known)."""
    sessions, first, last = _sessions(code)
    if first <= day <= last:
        return day in sessions
    return day.weekday() < 5


def any_market_open(calendars: Sequence[str], day: dt.date) -> bool:
    """True unless every instrument has an exchange calendar and all of them are shut on
    `day` (an instrument without a calendar counts as open on every run date)."""
    if not calendars or any(not code for code in calendars):
        return True
    return any(exchange_open(code, day) for code in dict.fromkeys(calendars))


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
