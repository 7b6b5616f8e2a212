"""The settings file: one TOML file, declared section by section with defaults and help.

Each section is a frozen dataclass whose fields carry their own type, default, help text and
check (see `setting`). The loader, the error messages and the documentation are all derived
from those declarations, so adding a key means adding one field. An unknown key is always
an error that suggests the nearest valid key: a typo must never be silently ignored.

Where the file is: `--config PATH`, else `$COMOVE_CONFIG`, else `./comove.toml`.
"""

from __future__ import annotations

import dataclasses
import os
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor.config_sections import (  # the sections, re-exported
    ComputeSettings,
    CorrelationSettings,
    DeskSettings,
    DigestSettings,
    InstrumentSettings,
    PagesSettings,
    ReturnsSettings,
    RuleSettings,
    SourcesSettings,
    StoreSettings,
)
from monitor.config_tables import section_problems, suggest_key, summarise_problems, type_name
from monitor.errors import ConfigError

DEFAULT_FILE = "comove.toml"
ENV_VAR = "COMOVE_CONFIG"




@dataclass(frozen=True)
class Section:
    """One section of the file: its dataclass and whether it is an array of tables."""

    cls: type
    array: bool = False
    raw: bool = False  # handed on as plain dicts, validated by their own module (rules)


SECTIONS: dict[str, Section] = {
    "store": Section(StoreSettings),
    "desk": Section(DeskSettings),
    "returns": Section(ReturnsSettings),
    "sources": Section(SourcesSettings),
    "instruments": Section(InstrumentSettings, array=True),
    "correlation": Section(CorrelationSettings),
    "rules": Section(RuleSettings, array=True, raw=True),
    "digest": Section(DigestSettings),
    "pages": Section(PagesSettings),
    "schedule": Section(RuleSettings, raw=True),
    "compute": Section(ComputeSettings),
}
"""Every section comove reads. Later features register theirs with `register_section`."""


def register_section(name: str, section: Section) -> None:
    SECTIONS[name] = section


@dataclass(frozen=True)
class Settings:
    """The whole settings file, validated. `sections` holds one object per section name."""

    path: Path | None
    base_dir: Path
    sections: Mapping[str, Any]

    @property
    def store(self) -> StoreSettings:
        return self.sections["store"]

    @property
    def desk(self) -> DeskSettings:
        return self.sections["desk"]

    @property
    def returns(self) -> ReturnsSettings:
        return self.sections["returns"]

    @property
    def sources(self) -> SourcesSettings:
        return self.sections["sources"]

    @property
    def instruments(self) -> tuple[InstrumentSettings, ...]:
        return self.sections["instruments"]

    def section(self, name: str) -> Any:
        return self.sections[name]

    @property
    def correlation(self) -> CorrelationSettings:
        return self.sections["correlation"]

    @property
    def rule_tables(self) -> tuple[dict[str, Any], ...]:
        return self.sections["rules"]

    @property
    def digest(self) -> DigestSettings:
        return self.sections["digest"]

    @property
    def pages(self) -> PagesSettings:
        return self.sections["pages"]

    @property
    def compute(self) -> ComputeSettings:
        found = self.sections.get("compute")
        return found if found is not None else ComputeSettings()

    @property
    def inbox(self) -> Path:
        return self.resolve_path(self.sources.inbox)

    def resolve_path(self, value: str) -> Path:
        path = Path(value).expanduser()
        return path if path.is_absolute() else self.base_dir / path

    @property
    def store_url(self) -> str:
        return resolve_store_url(self.store.url, self.base_dir)

    @property
    def groups(self) -> dict[str, list[str]]:
        groups: dict[str, list[str]] = {}
        for inst in self.instruments:
            if inst.group:
                groups.setdefault(inst.group, []).append(inst.symbol)
        return groups

    @property
    def symbols(self) -> list[str]:
        return [inst.symbol for inst in self.instruments]


def resolve_store_url(url: str, base_dir: Path) -> str:
    """Make a relative SQLite path absolute against `base_dir`; other URLs pass unchanged."""
    prefix_match = re.match(r"^(sqlite(?:\+\w+)?:///)(.*)$", url)
    if not prefix_match:
        return url
    prefix, rest = prefix_match.groups()
    if rest in ("", ":memory:") or rest.startswith("/") or rest.startswith("file:"):
        return url
    path_part, sep, query = rest.partition("?")
    absolute = (base_dir / Path(path_part).expanduser()).resolve()
    return f"{prefix}{absolute}{sep}{query}"


@dataclass(frozen=True)
class SettingsCheck:
    """The settings as far as they could be resolved, and every problem found.

    `sections` holds each section that validated (a section with a problem is missing);
    `settings` is None when there is any problem.
    """

    path: Path | None
    base_dir: Path
    sections: Mapping[str, Any]
    problems: tuple[str, ...]
    settings: Settings | None


def check_settings(data: Mapping[str, Any], *, path: Path | None = None,
                   base_dir: Path | None = None) -> SettingsCheck:
    """Validate a parsed TOML document completely: every section, the instruments' exchange
    calendars, the `[schedule]` and every `[[rules]]` table, collecting every problem."""
    where = path.name if path else "settings"
    base = base_dir or (path.parent.resolve() if path else Path.cwd())
    problems: list[str] = []
    for key in data:
        if key not in SECTIONS:
            problems.append(
                f"{where}: [{key}]: unknown section; {suggest_key(key, list(SECTIONS))}")
    sections: dict[str, Any] = {}
    for name, section in SECTIONS.items():
        raw = data.get(name, [] if section.array else {})
        if section.array:
            if not isinstance(raw, list):
                problems.append(f"{where}: {name}: expected [[{name}]] tables, got {raw!r}")
                continue
            if section.raw:
                bad = [i for i, table in enumerate(raw) if not isinstance(table, dict)]
                problems.extend(f"{where}: {name}[{i}]: expected a table" for i in bad)
                if not bad:
                    sections[name] = tuple(dict(t) for t in raw)
                continue
            items, failed = [], False
            for i, table in enumerate(raw):
                built, found = section_problems(section.cls, table, f"{name}[{i}]")
                problems.extend(found)
                failed = failed or bool(found)
                items.append(built)
            if not failed:
                sections[name] = tuple(items)
        elif section.raw:
            if isinstance(raw, dict):
                sections[name] = dict(raw)
            else:
                problems.append(f"{where}: [{name}]: expected a table, got {raw!r}")
        else:
            built, found = section_problems(section.cls, raw, name)
            problems.extend(found)
            if built is not None:
                sections[name] = built
    if "instruments" in sections:
        problems.extend(_instrument_problems(sections["instruments"]))
    problems.extend(_raw_section_problems(sections, base))
    settings = None
    if not problems:
        settings = Settings(path=path, base_dir=base, sections=sections)
    return SettingsCheck(path=path, base_dir=base, sections=sections,
                         problems=tuple(problems), settings=settings)


def parse_settings(data: Mapping[str, Any], *, path: Path | None = None,
                   base_dir: Path | None = None) -> Settings:
    """Validate an already parsed TOML document.

    Raises
    ------
    ConfigError
        Naming the first problem and counting the others (`problems` lists them all).
    """
    checked = check_settings(data, path=path, base_dir=base_dir)
    if checked.settings is None:
        raise ConfigError(summarise_problems(list(checked.problems)), list(checked.problems))
    return checked.settings


def _instrument_problems(items: tuple[InstrumentSettings, ...]) -> list[str]:
    problems = []
    seen: dict[str, int] = {}
    for i, inst in enumerate(items):
        if inst.symbol in seen:
            problems.append(
                f"instruments[{i}].symbol: {inst.symbol!r} is already listed as "
                f"instruments[{seen[inst.symbol]}]"
            )
        seen.setdefault(inst.symbol, i)
    return problems


def _raw_section_problems(sections: Mapping[str, Any], base_dir: Path) -> list[str]:
    """The `[schedule]` and `[[rules]]` tables, checked by the modules that own them."""
    from monitor.calendar import parse_schedule
    from monitor.rules import rule_problems

    problems: list[str] = []
    desk = sections.get("desk")
    if "schedule" in sections and desk is not None:
        try:
            parse_schedule(sections["schedule"], desk_timezone=desk.timezone, base_dir=base_dir)
        except ConfigError as exc:
            problems.extend(exc.problems)
    correlation = sections.get("correlation")
    instruments = sections.get("instruments", ())
    if "rules" in sections and correlation is not None:
        groups: dict[str, list[str]] = {}
        for inst in instruments:
            if inst.group and inst.symbol not in groups.get(inst.group, []):
                groups.setdefault(inst.group, []).append(inst.symbol)
        # With no instruments listed the store decides the symbols: kinds and keys only.
        symbols = list(dict.fromkeys(inst.symbol for inst in instruments)) or None
        problems.extend(rule_problems(sections["rules"], symbols=symbols, groups=groups,
                                      default_measure=correlation.default_measure,
                                      max_window=correlation.max_window))
    if correlation is not None:
        problems.extend(_window_problems(correlation))
    return problems


def _window_problems(correlation: CorrelationSettings) -> list[str]:
    """The [correlation] measures: correlations (not `beta:` / `r2:`), within `max_window`
    (the rules' are checked with them)."""
    from monitor.engine import parse_measure, window_problem
    from monitor.errors import SpecError

    problems = []
    named = [(f"correlation.measures[{i}]", text) for i, text in enumerate(correlation.measures)]
    for key, text in [*named, ("correlation.default_measure", correlation.default_measure)]:
        try:
            parsed = parse_measure(text)
        except SpecError:
            continue  # reported by the key's own check
        if parsed.output != "r":
            # The pages' matrices, group averages and largest changes read these as a
            # symmetric correlation; a slope of B on A is not one.
            problems.append(f"{key}: {text!r} is a hedge ratio or R squared, not a "
                            "correlation; name it in a hedge rule or `comove series --measure`")
            continue
        problem = window_problem(parsed, correlation.max_window)
        if problem:
            problems.append(f"{key}: {problem}")
    return problems


def find_settings_file(explicit: str | os.PathLike[str] | None = None,
                       environ: Mapping[str, str] | None = None) -> Path:
    """`--config PATH`, else `$COMOVE_CONFIG`, else `./comove.toml`."""
    env = os.environ if environ is None else environ
    if explicit:
        return Path(explicit)
    if env.get(ENV_VAR):
        return Path(env[ENV_VAR])
    return Path(DEFAULT_FILE)


def read_settings_file(explicit: str | os.PathLike[str] | None = None,
                       environ: Mapping[str, str] | None = None) -> tuple[Path, dict[str, Any]]:
    """Find and parse the settings file (TOML only, nothing validated yet)."""
    path = find_settings_file(explicit, environ)
    if not path.is_file():
        raise ConfigError(
            f"settings file {path} not found (give --config PATH or set {ENV_VAR}; "
            "`comove init --example` writes a commented one)"
        )
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from None
    return path.resolve(), data


def load_settings(explicit: str | os.PathLike[str] | None = None,
                  environ: Mapping[str, str] | None = None) -> Settings:
    """Read and validate the whole settings file, rules and schedule included.

    Raises
    ------
    ConfigError
        The file is missing or not TOML, or any key is wrong: the message names the first
        problem and counts the rest (`comove check` prints them all).
    """
    path, data = read_settings_file(explicit, environ)
    return parse_settings(data, path=path)


def inspect_settings(explicit: str | os.PathLike[str] | None = None,
                     environ: Mapping[str, str] | None = None) -> SettingsCheck:
    """Every problem of the settings file at once, with what did resolve (`comove check`)."""
    path, data = read_settings_file(explicit, environ)
    return check_settings(data, path=path)


@dataclass(frozen=True)
class KeyDoc:
    """One documented key, for the README settings reference and `comove check`."""

    path: str
    type: str
    default: str
    help: str


def documented_keys() -> list[KeyDoc]:
    """Every key of every structured section, derived from the declarations."""
    docs: list[KeyDoc] = []
    for name, section in SECTIONS.items():
        if section.raw:
            continue
        prefix = f"[[{name}]]" if section.array else f"[{name}]"
        for fld in dataclasses.fields(section.cls):
            meta = fld.metadata
            if fld.default is not dataclasses.MISSING:
                default = repr(fld.default)
            elif fld.default_factory is not dataclasses.MISSING:
                default = repr(list(fld.default_factory()))
            else:
                default = "(required)"
            kind = type_name(meta["type"])
            if meta["choices"]:
                kind = " | ".join(meta["choices"])
            docs.append(KeyDoc(f"{prefix} {fld.name}", kind, default, meta["help"]))
    return docs
