"""What `comove check` prints: the settings as resolved (defaults filled in, paths made
absolute, the schedule's holidays counted, each rule's targets counted) and every problem."""

from __future__ import annotations

import dataclasses
import json
import re
from collections import Counter
from collections.abc import Mapping
from typing import Any

from monitor.config import SECTIONS, SettingsCheck, resolve_store_url


def _value(value: Any) -> str:
    if isinstance(value, tuple):
        value = list(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    return json.dumps(value, ensure_ascii=False)


def _mask(url: str) -> str:
    return re.sub(r"(://[^:/@]*:)[^@]*@", r"\1***@", url)


def describe_check(checked: SettingsCheck) -> list[str]:
    """Lines of the report: file, each section resolved, then the problems (or none)."""
    lines = [f"settings file: {checked.path}"]
    sections = checked.sections
    for name, section in SECTIONS.items():
        if name in ("instruments", "rules", "schedule"):
            continue
        if name not in sections:
            lines.append(f"[{name}]  (not resolved: see the problems below)")
            continue
        lines.append(f"[{name}]")
        for fld in dataclasses.fields(section.cls):
            value = getattr(sections[name], fld.name)
            if name == "store" and fld.name == "url":
                value = _mask(resolve_store_url(value, checked.base_dir))
            lines.append(f"  {fld.name} = {_value(value)}")
    lines.extend(_instruments(sections))
    lines.extend(_schedule(checked))
    lines.extend(_rules(checked))
    if checked.problems:
        lines.append(f"{len(checked.problems)} problem(s):")
        lines.extend(f"  {problem}" for problem in checked.problems)
    else:
        lines.append("no problems found")
    return lines


def _instruments(sections: Mapping[str, Any]) -> list[str]:
    if "instruments" not in sections:
        return ["[[instruments]]  (not resolved: see the problems below)"]
    items = sections["instruments"]
    if not items:
        return ["[[instruments]]  none listed: every symbol in the closes files is monitored"]
    groups = Counter(inst.group or "(no group)" for inst in items)
    calendars = Counter(inst.calendar or "(none)" for inst in items)
    return [
        f"[[instruments]]  {len(items)} listed",
        "  groups: " + ", ".join(f"{g} {n}" for g, n in sorted(groups.items())),
        "  calendars: " + ", ".join(f"{c} {n}" for c, n in sorted(calendars.items())),
    ]


def _schedule(checked: SettingsCheck) -> list[str]:
    from monitor.calendar import parse_schedule
    from monitor.errors import ConfigError

    raw = checked.sections.get("schedule")
    desk = checked.sections.get("desk")
    if raw is None or desk is None:
        return ["[schedule]  (not resolved: see the problems below)"]
    try:
        schedule = parse_schedule(raw, desk_timezone=desk.timezone, base_dir=checked.base_dir)
    except ConfigError:
        return ["[schedule]  (not resolved: see the problems below)"]
    source = f" (calendar {raw['calendar']} included)" if raw.get("calendar") else ""
    return [
        "[schedule]",
        f"  days = {_value(schedule.days)}",
        f"  time = \"{schedule.time:%H:%M}\"",
        f"  timezone = \"{schedule.timezone}\"",
        f"  holidays: {len(schedule.holidays)} date(s){source}",
    ]


def _rules(checked: SettingsCheck) -> list[str]:
    from monitor.errors import ConfigError
    from monitor.rules import build_rules

    tables = checked.sections.get("rules")
    if tables is None:
        return ["[[rules]]  (not resolved: see the problems below)"]
    if not tables:
        return ["[[rules]]  none: only the data-feed check runs"]
    settings = checked.settings
    lines = [f"[[rules]]  {len(tables)}"]
    if settings is None or not settings.instruments:
        for table in tables:
            lines.append(f"  {table.get('name', '?')} ({table.get('kind', '?')})")
        if settings is not None:
            lines.append("  (targets are checked against the store's symbols when the rules "
                         "run: no instruments are listed)")
        return lines
    try:
        rules = build_rules(list(settings.rule_tables), symbols=settings.symbols,
                            groups=settings.groups,
                            default_measure=settings.correlation.default_measure,
                            max_window=settings.correlation.max_window)  # as at load: reused
    except ConfigError:  # already among the problems
        return lines
    for rule in rules:
        measures = ", ".join(rule.measures()) or "-"
        lines.append(f"  {rule.name} ({rule.kind}, {rule.severity}): {len(rule.targets):,} "
                     f"target(s), measure {measures}")
    return lines
