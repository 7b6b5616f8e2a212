"""Checking one table of the settings file against its section's dataclass.

Each key's declaration (`monitor.config.setting`: type, item type, choices, check) decides
what is accepted; every problem of a table is collected as one line naming the key path,
the value and what was expected, so `comove check` can list them all at once.
"""

from __future__ import annotations

import dataclasses
import difflib
from typing import Any

from monitor.errors import ConfigError
from monitor.renamed import OLD_SETTING_KEYS, old_name_hint


def type_name(expected: type | tuple[type, ...]) -> str:
    names = {str: "a string", int: "an integer", float: "a number", bool: "true or false",
             list: "a list", tuple: "a list"}
    if isinstance(expected, tuple):
        if set(expected) == {int, float}:
            return "a number"
        return " or ".join(names.get(t, t.__name__) for t in expected)
    return names.get(expected, expected.__name__)


def type_ok(value: Any, expected: type | tuple[type, ...]) -> bool:
    kinds = expected if isinstance(expected, tuple) else (expected,)
    if isinstance(value, bool) and bool not in kinds:
        return False  # TOML true is not a number here
    return isinstance(value, kinds)


def suggest_key(key: str, valid: list[str]) -> str:
    near = difflib.get_close_matches(key, valid, n=1, cutoff=0.5)
    if near:
        return f"did you mean '{near[0]}'?"
    return "valid keys: " + ", ".join(sorted(valid))


def build_section(cls: type, raw: Any, path: str) -> Any:
    """Validate one table against its dataclass; every error names the key path and value.

    Raises
    ------
    ConfigError
        Naming the first problem; `problems` lists every problem of the table.
    """
    built, problems = section_problems(cls, raw, path)
    if problems:
        raise ConfigError(summarise_problems(problems), problems)
    return built


def section_problems(cls: type, raw: Any, path: str) -> tuple[Any, list[str]]:
    """The section object (None when any key is wrong) and every problem of the table."""
    if not isinstance(raw, dict):
        return None, [f"{path}: expected a table, got {raw!r}"]
    fields = {f.name: f for f in dataclasses.fields(cls)}
    problems: list[str] = []
    if "password" in raw and "password_env" in fields:
        problems.append(
            f"{path}.password: a password in the settings file is refused; put it in an "
            f"environment variable and name that variable in {path}.password_env"
        )
    for key in raw:
        if key not in fields and key != "password":
            if OLD_SETTING_KEYS.get(key) in fields:
                problems.append(f"{path}.{key}: {old_name_hint(key, OLD_SETTING_KEYS[key])}")
            else:
                problems.append(f"{path}.{key}: unknown key; {suggest_key(key, list(fields))}")
    values: dict[str, Any] = {}
    for fld in fields.values():
        problem = _read_key(fld, raw, path, values)
        if problem:
            problems.append(problem)
    if problems:
        return None, problems
    return cls(**values), []


def _read_key(fld: dataclasses.Field[Any], raw: dict[str, Any], path: str,
              values: dict[str, Any]) -> str | None:
    """Check one key of a table into `values`; return its problem, if any."""
    name, meta = fld.name, fld.metadata
    if name not in raw:
        if fld.default is dataclasses.MISSING and fld.default_factory is dataclasses.MISSING:
            return f"{path}.{name}: required key is missing ({meta['help']})"
        return None
    value = raw[name]
    expected = meta["type"]
    if not type_ok(value, expected):
        return f"{path}.{name}: {value!r} is not {type_name(expected)}"
    if isinstance(value, list):
        item = meta.get("item")
        for i, element in enumerate(value):
            if item is not None and not type_ok(element, item):
                return f"{path}.{name}[{i}]: {element!r} is not {type_name(item)}"
        value = tuple(value)
    if meta["choices"] and value not in meta["choices"]:
        return f"{path}.{name}: {value!r} is not one of " + ", ".join(meta["choices"])
    check = meta["check"]
    if check is not None:
        problem = check(value)
        if problem and meta.get("secret"):
            return (f"{path}.{name}: the value given is not {problem}; it is not shown here "
                    "in case it is the password itself")
        if problem:
            return f"{path}.{name}: {raw[name]!r} is not {problem}"
    values[name] = value
    return None


MORE_PROBLEMS = "(and {count} more: `comove check` lists them all)"
"""Appended to the first problem when the file has several."""


def summarise_problems(problems: list[str]) -> str:
    if len(problems) == 1:
        return problems[0]
    return f"{problems[0]} " + MORE_PROBLEMS.format(count=len(problems) - 1)
