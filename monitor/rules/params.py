"""Declared rule parameters, the checked reading of one ``[[rules]]`` table, measure specs.

Every rule kind lists its settings as :class:`Param` records (name, type, default, help);
the settings documentation is generated from them and :class:`TableReader` enforces them,
so what the docs say and what the loader accepts cannot drift apart.

Error messages are one line and always start with the rule's position and name and the
key at fault, e.g. ``rules[2] (hedge-break).clear: ...``.
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

from monitor.errors import ConfigError
from monitor.renamed import OLD_RULE_KEYS, OLD_RULE_VALUES, old_name_hint

ParamType = Literal["int", "float", "str", "bool", "str_list", "str_or_list"]

_TYPE_LABELS: dict[str, str] = {
    "int": "integer",
    "float": "number",
    "str": "string",
    "bool": "boolean",
    "str_list": "list of strings",
    "str_or_list": "string or list of strings",
}

NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
"""Rule names travel into alert keys and page addresses, so they stay URL-safe."""


@dataclass(frozen=True)
class Param:
    """One setting of a rule kind, as documented and as checked.

    Attributes
    ----------
    name : str
        Key in the ``[[rules]]`` table.
    type : ParamType
        Expected TOML type; ``float`` also accepts integers, never booleans.
    help : str
        One sentence for the settings documentation.
    default : object
        Value used when the key is absent; ``None`` means no fixed default (either the key is
        required or the default depends on other keys, which ``help`` explains).
    required : bool
        The key must be present.
    choices : tuple of str
        Allowed words for a string setting (empty: any string).
    minimum, maximum : float or None
        Inclusive bounds for a numeric setting.
    """

    name: str
    type: ParamType
    help: str
    default: object = None
    required: bool = False
    choices: tuple[str, ...] = ()
    minimum: float | None = None
    maximum: float | None = None

    @property
    def type_label(self) -> str:
        """Human word for the type, for generated documentation."""
        return _TYPE_LABELS[self.type]


def suggestion(word: str, known: Iterable[str]) -> str:
    """Return ``" (did you mean 'x'?)"`` for the closest known word, or ``""``."""
    close = difflib.get_close_matches(word, list(known), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _describe(value: object) -> str:
    return f"{value!r} ({type(value).__name__})"


class TableReader:
    """Checked access to one ``[[rules]]`` table.

    Parameters
    ----------
    table : Mapping
        The TOML-parsed table.
    index : int
        Position of the table in the ``rules`` list, for messages.
    params : sequence of Param
        Every key the rule kind accepts.
    kind : str
        The rule kind, for messages.
    """

    def __init__(
        self, table: Mapping[str, object], index: int, params: Sequence[Param], kind: str
    ) -> None:
        self.table = table
        self.index = index
        self.kind = kind
        self.params = {param.name: param for param in params}
        raw_name = table.get("name")
        self.name = raw_name if isinstance(raw_name, str) and raw_name else None

    def where(self, key: str) -> str:
        """Message prefix naming the rule and the key, e.g. ``rules[2] (hedge-break).clear``."""
        label = f"rules[{self.index}]"
        if self.name is not None:
            label += f" ({self.name})"
        return f"{label}.{key}"

    def error(self, key: str, message: str) -> ConfigError:
        """Build (not raise) a one-line :class:`ConfigError` about ``key``."""
        return ConfigError(f"{self.where(key)}: {message}")

    def has(self, key: str) -> bool:
        """True when the table sets ``key``."""
        return key in self.table

    def check_keys(self) -> None:
        """Reject keys the kind does not know, suggesting the nearest known one.

        Runs before any value is read so that a misspelt key is reported as such rather
        than as a missing required key.
        """
        for key in self.table:
            if key not in self.params:
                renamed = OLD_RULE_KEYS.get(self.kind, {}).get(key)
                if renamed is not None:
                    raise self.error(key, old_name_hint(key, renamed))
                hint = suggestion(key, self.params)
                raise self.error(key, f"unknown key for kind {self.kind!r}{hint}")

    def _raw(self, key: str) -> object:
        param = self.params[key]
        if key in self.table:
            return self.table[key]
        if param.required:
            raise self.error(key, "missing required key")
        return param.default

    def _check_bounds(self, key: str, value: float) -> None:
        param = self.params[key]
        if param.minimum is not None and value < param.minimum:
            raise self.error(key, f"{value!r} is below the minimum {param.minimum:g}")
        if param.maximum is not None and value > param.maximum:
            raise self.error(key, f"{value!r} is above the maximum {param.maximum:g}")

    def read_int(self, key: str) -> int:
        """Integer setting (booleans and floats are refused)."""
        value = self._raw(key)
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"expected an integer, got {_describe(value)}")
        self._check_bounds(key, value)
        return value

    def read_float(self, key: str) -> float | None:
        """Number setting, or None when absent without a default."""
        value = self._raw(key)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.error(key, f"expected a number, got {_describe(value)}")
        number = float(value)
        if not math.isfinite(number):
            raise self.error(key, f"expected a finite number, got {value!r}")
        self._check_bounds(key, number)
        return number

    def read_number(self, key: str) -> float:
        """Number setting that always has a value (required, or declared with a default)."""
        number = self.read_float(key)
        if number is None:
            raise self.error(key, "missing required key")
        return number

    def read_str(self, key: str) -> str | None:
        """String setting, or None when absent without a default; choices enforced."""
        value = self._raw(key)
        if value is None:
            return None
        if not isinstance(value, str):
            raise self.error(key, f"expected a string, got {_describe(value)}")
        choices = self.params[key].choices
        if choices and value not in choices:
            renamed = OLD_RULE_VALUES.get(key, {}).get(value)
            if renamed is not None:
                raise self.error(key, old_name_hint(value, renamed))
            hint = suggestion(value, choices)
            raise self.error(key, f"{value!r} is not one of {', '.join(choices)}{hint}")
        return value

    def read_bool(self, key: str) -> bool:
        """Boolean setting."""
        value = self._raw(key)
        if not isinstance(value, bool):
            raise self.error(key, f"expected true or false, got {_describe(value)}")
        return value

    def read_names(self, key: str) -> list[str] | None:
        """List-of-strings setting (a single string is accepted for ``str_or_list``)."""
        value = self._raw(key)
        if value is None:
            return None
        if isinstance(value, str) and self.params[key].type == "str_or_list":
            return [value]
        if not isinstance(value, list) or not all(isinstance(item, str) for item in value):
            raise self.error(key, f"expected a list of strings, got {_describe(value)}")
        return list(value)


# --- measure specs ---------------------------------------------------------------------

MeasureFamily = Literal["rolling", "rank", "ewma"]
MIN_WINDOW = 3
"""Fisher's standard error 1/sqrt(n - 3) needs at least three observations."""


@dataclass(frozen=True)
class MeasureSpec:
    """What the rules need to know about a measure spec.

    Attributes
    ----------
    text : str
        Canonical text; the pipeline keys :class:`~monitor.rules.inputs.DayInputs.measures`
        by it.
    family : {"rolling", "rank", "ewma"}
        Estimator family.
    window : int or None
        Window length in days for ``rolling`` and ``rank``; None for ``ewma``.
    decay : float or None
        EWMA decay factor lambda (from ``lambda=`` or ``hl=``); None for windows.
    """

    text: str
    family: MeasureFamily
    window: int | None
    decay: float | None

    def is_shorter_than(self, other: MeasureSpec) -> bool:
        """True when this measure remembers fewer days than ``other`` (same family)."""
        if self.window is not None and other.window is not None:
            return self.window < other.window
        if self.decay is not None and other.decay is not None:
            return self.decay < other.decay
        return False


_WINDOW_SPEC = re.compile(r"^(rolling|rank):(\d+)$")
_EWMA_SPEC = re.compile(r"^ewma:(.+)$")
_EWMA_OPTION = re.compile(r"^(hl|lambda|mean)=([A-Za-z0-9_.+-]+)$")


def _check_measure(text: str) -> MeasureSpec:
    """Validate a measure spec and return what the rules need of it.

    The engine's ``parse_measure`` is the authority on the syntax and on the canonical
    spelling; its :class:`SpecError` propagates.

    Raises
    ------
    SpecError
        The spec cannot be parsed, or its window is shorter than 3.
    """
    from monitor.engine import parse_measure

    measure = parse_measure(text)
    return MeasureSpec(
        text=measure.text, family=measure.kind, window=measure.window, decay=measure.lam
    )
