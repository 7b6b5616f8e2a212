"""The sections of the settings file, one frozen dataclass each, and the checks of their
values: each field carries its type, default, help text and check (`setting`).

`monitor.config` reads the file against these declarations and re-exports them.
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, get_args
from urllib.parse import urlsplit
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from monitor._typing import ComputeEngine, ReturnKind, SmtpSecurity
from monitor.symbols import symbol_problem

DEFAULT_FILE = "comove.toml"
ENV_VAR = "COMOVE_CONFIG"

Check = Callable[[Any], str | None]
"""Returns None when the value is fine, else what was expected (e.g. 'a number > 0')."""

_REQUIRED: Any = dataclasses.MISSING


def setting(
    default: Any,
    help: str,
    *,
    kind: type | tuple[type, ...] = str,
    check: Check | None = None,
    choices: tuple[str, ...] | None = None,
    item: type | None = None,
    secret: bool = False,
) -> Any:
    """Declare one key: its default (`_REQUIRED` for none), help text, type and check.
    A `secret` key's value is never repeated in a message (someone may have typed the
    password itself into it)."""
    meta = {"help": help, "type": kind, "check": check, "choices": choices, "item": item,
            "secret": secret}
    if isinstance(default, list | tuple):
        frozen = tuple(default)
        return field(default_factory=lambda: frozen, metadata=meta)
    return field(default=default, metadata=meta)


def _positive(value: Any) -> str | None:
    return None if value > 0 else "a number > 0"


def _pair_labels(value: Any) -> str | None:
    for item in value:
        a, slash, b = str(item).partition("/")
        if not slash or not a.strip() or not b.strip() or "/" in b:
            return "pairs written \"A/B\" (two symbols and one slash)"
    return None


def _at_least(low: int) -> Check:
    def check(value: Any) -> str | None:
        return None if value >= low else f"an integer >= {low}"

    return check


def _timezone(value: Any) -> str | None:
    try:
        ZoneInfo(value)
    except (ZoneInfoNotFoundError, ValueError):
        return "an IANA time zone such as 'Europe/Berlin' or 'America/New_York'"
    return None


def _symbol(value: Any) -> str | None:
    return symbol_problem(value)


@dataclass(frozen=True)
class StoreSettings:
    """[store]: where closes, alerts and runs are kept."""

    url: str = setting(
        "sqlite:///comove.sqlite",
        "SQLAlchemy URL of the store. A relative SQLite path is resolved against the folder "
        "of the settings file; PostgreSQL as postgresql://user@host:port/database.",
    )
    busy_timeout: float = setting(
        30.0,
        "Seconds a writer (an ingest, a run, a backfill) waits for another one to finish "
        "before it stops with an error; it says once that it is waiting.",
        kind=(int, float),
        check=_positive,
    )


@dataclass(frozen=True)
class DeskSettings:
    """[desk]: who the monitor works for."""

    name: str = setting("Desk", "Name of the desk, shown in the digest and the pages.")
    watch: tuple[str, ...] = setting(
        [], "Pairs \"A/B\" whose history page is always built with its charts, alert or "
        "not.", kind=list, item=str, check=_pair_labels)
    charted_pairs: int = setting(
        250, "Most pairs, besides the watch list, whose history pages carry charts: those "
        "with open alerts first (most severe, latest), then by their latest alert; the "
        "others' pages list their alerts and events without charts.", kind=int,
        check=_at_least(0))
    timezone: str = setting(
        "UTC",
        "IANA time zone of the desk; decides what 'today' is (closes dated later are refused).",
        check=_timezone,
    )


@dataclass(frozen=True)
class ReturnsSettings:
    """[returns]: how closes become returns."""

    kind: ReturnKind = setting("log", "Return kind: log or simple.",
                              choices=get_args(ReturnKind))
    horizon: int = setting(
        1,
        "Days per return. Above 1 gives non-overlapping multi-day returns, which lessens the "
        "downward bias when instruments close in different time zones.",
        kind=int,
        check=_at_least(1),
    )
    fill_limit: int = setting(
        0,
        "Carry the last close forward over at most this many missing days, giving zero "
        "returns (0: never; a missing close then leaves only that day's return missing).",
        kind=int,
        check=_at_least(0),
    )
    max_gap: int = setting(
        5,
        "A return runs from the instrument's own previous close across days its market was "
        "shut, if that close is at most this many business days back (else it is missing).",
        kind=int,
        check=_at_least(1),
    )
    suspect_move: float = setting(
        0.25,
        "A daily |log return| above this is accepted but reported as a suspect tick.",
        kind=(int, float),
        check=_positive,
    )


@dataclass(frozen=True)
class SourcesSettings:
    """[sources]: where closes come from."""

    inbox: str = setting(
        "inbox",
        "Folder of CSV files (.csv or .csv.gz) the daily run collects; relative to the "
        "settings file's folder.",
    )
    skip_bad: bool = setting(
        False,
        "Daily inbox: write a file's good rows and skip its bad lines instead of refusing "
        "the whole file. Each skipped line is named (file:line, field, value) in "
        "processed/<file>.problems.txt, in the log and in the digest's Data feed block, "
        "and `comove run --once` exits 3.",
        kind=bool,
    )
    allow_new_symbols: bool = setting(
        False,
        "Accept closes for symbols not listed under [[instruments]] (they are added with "
        "empty name and group). Ignored when no instruments are listed: then every symbol "
        "is accepted.",
        kind=bool,
    )


def _exchange_code(value: Any) -> str | None:
    if value == "":
        return None
    from monitor.calendar import code_hint, exchange_codes

    if value in exchange_codes():
        return None
    return f"an exchange calendar code ({code_hint(value)})"


@dataclass(frozen=True)
class InstrumentSettings:
    """[[instruments]]: one table per monitored instrument."""

    symbol: str = setting(_REQUIRED, "Code of the instrument as it appears in the CSV files.",
                          check=_symbol)
    name: str = setting("", "Readable name, shown in the digest and the pages.")
    group: str = setting(
        "", "Group the instrument belongs to (rules and the digest's group averages use groups)."
    )
    currency: str = setting("", "Currency of the close.")
    calendar: str = setting(
        "", "Exchange calendar code of the instrument's market as the exchange_calendars "
        "package names it (e.g. 'XNYS', 'XLON', 'XTKS'); empty: open on every run date. When "
        "every instrument's market is shut, the day raises no data-feed alert.",
        check=_exchange_code,
    )


def _level(value: Any) -> str | None:
    return None if 0.5 <= value < 1 else "a confidence level between 0.5 and 1 (e.g. 0.95)"


def _measure_list(value: Any) -> str | None:
    from monitor.engine import parse_measure
    from monitor.errors import SpecError

    for text in value:
        try:
            parse_measure(text)
        except SpecError as exc:
            return f"a list of measure specs ({exc})"
    return None if value else "a non-empty list of measure specs"


def _measure(value: Any) -> str | None:
    return _measure_list([value])


@dataclass(frozen=True)
class CorrelationSettings:
    """[correlation]: measures shown and the confidence band."""

    level: float = setting(
        0.95, "Confidence level of every Fisher z band (and of `require_band` level rules).",
        kind=(int, float), check=_level,
    )
    measures: tuple[str, ...] = setting(
        ["rolling:63", "ewma:hl=21"],
        "Measures shown on the pair pages and offered by `comove series` by default; the "
        "first is also the measure of the 'largest changes' table in the digest.",
        kind=list, item=str, check=_measure_list,
    )
    default_measure: str = setting(
        "rolling:63", "Measure of a rule that does not name one.", check=_measure,
    )
    max_window: int = setting(
        2520,
        "Longest window (rows of returns) of any measure, and longest EWMA half-life, in "
        "business days (2520: about ten years). A longer one is a settings error: it could "
        "exhaust the memory and shows nothing until that much history exists.",
        kind=int, check=_at_least(3),
    )
    largest_changes_days: int = setting(
        5, "Business days over which the digest's 'largest changes' are measured.",
        kind=int, check=_at_least(1),
    )
    group_average_days: int = setting(
        21, "Business days over which a group average's change is shown (about a month).",
        kind=int, check=_at_least(1),
    )
    history_days: int = setting(
        252, "Business days of history drawn in the digest's alert charts (about a year).",
        kind=int, check=_at_least(20),
    )


def _port(value: Any) -> str | None:
    return None if 0 < value < 65536 else "a TCP port between 1 and 65535"


def _env_name(value: Any) -> str | None:
    if value == "" or re.match(r"^[A-Za-z_][A-Za-z0-9_]*$", value):
        return None
    return "the name of an environment variable (letters, digits, '_')"


def _single_line_address(value: Any) -> str | None:
    """An address is one line: a line break in it would add a header to the email."""
    if not str(value).strip() or "\n" in str(value) or "\r" in str(value):
        return "a single-line address"
    return None


def _single_line_addresses(value: Any) -> str | None:
    bad = [address for address in value if _single_line_address(address)]
    return f"a list of single-line addresses ({bad[0]!r} is not)" if bad else None


@dataclass(frozen=True)
class DigestSettings:
    """[digest]: the evening email and where rendered digests are kept."""

    recipients: tuple[str, ...] = setting(
        [], "Addresses the digest is sent to; empty: the digest is rendered but not sent.",
        kind=list, item=str, check=_single_line_addresses,
    )
    sender: str = setting("comove@localhost", "From address of the digest.",
                          check=_single_line_address)
    smtp_host: str = setting("localhost", "Host name of the SMTP server that relays the digest.")
    smtp_port: int = setting(587, "SMTP port (587 for starttls, 465 for tls).", kind=int,
                             check=_port)
    security: SmtpSecurity = setting("starttls", "starttls, tls (implicit) or none.",
                                     choices=get_args(SmtpSecurity))
    username: str = setting("", "SMTP login name; empty: no login.")
    password_env: str = setting(
        "", "Name of the environment variable that holds the SMTP password (a password in "
        "this file is refused).", check=_env_name, secret=True,
    )
    ca_file: str = setting(
        "", "PEM file of certificate authorities to trust for the SMTP server (a private "
        "relay); empty: the system's.",
    )
    attempts: int = setting(3, "Tries per send before the digest is left failed in the "
                            "outbox.", kind=int, check=_at_least(1))
    backoff_seconds: float = setting(2.0, "Wait before the second try; doubles each time.",
                                     kind=(int, float), check=_positive)
    max_email_bytes: int = setting(
        2_000_000, "Largest digest email in bytes (mail relays refuse large messages): a "
        "longer one leaves out alert charts, then shows fewer alerts in full, and says so "
        "in a 'Shortened:' line.", kind=int, check=_at_least(20_000))
    folder: str = setting(
        "digests", "Folder of rendered digests, one sub-folder per date; relative to the "
        "settings file's folder.",
    )


def _web_address(value: Any) -> str | None:
    if value == "":
        return None
    parts = urlsplit(value)
    if (parts.scheme in ("http", "https") and parts.netloc and not parts.query
            and not parts.fragment and not any(c.isspace() for c in value)):
        return None
    return "an http:// or https:// address without query or fragment (or empty)"


@dataclass(frozen=True)
class PagesSettings:
    """[pages]: the history pages, as readers of the digest reach them."""

    base_url: str = setting(
        "", "Address where the built history pages are published (http:// or https://, "
        "e.g. https://risk.halden.example/comove/); the digest then links every alert to its "
        "pair's page there. Empty: the digest carries no links.", check=_web_address,
    )

    @property
    def site_url(self) -> str:
        """`base_url` ending in "/" (pages' paths are joined to it), or ""."""
        return self.base_url if not self.base_url or self.base_url.endswith("/") \
            else self.base_url + "/"


def _scheduler(value: Any) -> str | None:
    text = str(value)
    if text == "local" or re.match(r"^(tcp|tls)://[^\s/]+:\d+$", text):
        return None
    return '"local" or a scheduler address such as "tcp://host:8786"'


@dataclass(frozen=True)
class ComputeSettings:
    """[compute]: where the tiles of the pair matrix are computed in a backfill."""

    engine: ComputeEngine = setting(
        "local", "local (every tile in this process) or dask (tiles as tasks on a Dask "
        "cluster; needs the `dask` extra).", choices=get_args(ComputeEngine))
    scheduler: str = setting(
        "local", "With engine = \"dask\": \"local\" (start a cluster of worker processes "
        "on this machine) or the address of a running scheduler (tcp://host:8786).",
        check=_scheduler)
    workers: int = setting(2, "Worker processes of a local cluster.", kind=int,
                           check=_at_least(1))
    threads_per_worker: int = setting(1, "Threads of each worker of a local cluster.",
                                      kind=int, check=_at_least(1))
    tile_size: int = setting(
        512, "Instruments per side of a tile (block I x block J of the pair matrix): one "
        "task per tile.", kind=int, check=_at_least(2))
    connect_seconds: float = setting(
        10.0, "How long to wait for the scheduler before the run stops with an error.",
        kind=(int, float), check=_positive)


@dataclass(frozen=True)
class RuleSettings:
    """[[rules]] and [schedule]: validated by their own modules (monitor.rules declares each
    rule kind's keys, monitor.scheduler the schedule's)."""
