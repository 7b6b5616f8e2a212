"""Measure specs: the text a desk writes (``rolling:63``, ``ewma:hl=21``) and its parsed form.

This module owns the spec syntax, its validation and its canonical spelling. The syntax is
comove's own::

    rolling:W[,min=M][,scale=vol]        Pearson over the trailing W returns
    rank:W[,min=M][,scale=vol]           Spearman over the trailing W returns
    ewma:hl=H[,mean=weighted|zero][,min=M][,scale=vol]
    ewma:lambda=L[,mean=weighted|zero][,min=M][,scale=vol]

``W`` is a whole number of rows (business days), at least 3; ``M`` is the minimum count below
which a value is NaN: the pair's common observations for ``rolling``/``rank`` (default W,
at least 2), the Kish effective count for ``ewma``. ``H > 0`` is a half-life in rows and
``0 < L < 1`` the daily decay, related by ``L = 0.5 ** (1 / H)``.

The EWMA default minimum is ``round(H)`` but at least 2, capped at the largest effective
count an EWMA can reach, ``floor((1 + L) / (1 - L))`` (Kish 1965 limit), so that the
default never makes every value NaN.

Regression forms (pair A/B: the second instrument's returns on the first's, with a
constant)::

    beta:W[,min=M]                       OLS slope cov(A, B) / var(A) over the trailing W
    beta:hl=H|lambda=L[,mean=..][,min=M] the same with EWMA weights
    r2:W[,min=M]  r2:hl=H|...            R squared of that regression (r squared)

They are computed from the Pearson measure of the same window or weights
(:attr:`Measure.output` says which number is reported) and do not take ``scale=``.

``scale=vol`` (default ``none``) computes the measure on the returns standardised by their
own lagged EWMA volatility (:func:`monitor.engine.scaling.standardise`) instead of the plain
returns; the statistical rules read it. A standardised return needs at least 20 returns in
the 250 rows before it, so such a measure starts later than its plain twin. The canonical
text carries ``,scale=vol`` last.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Literal

from monitor.errors import EngineInputError, SpecError

MeasureKind = Literal["rolling", "rank", "ewma"]
MeanMode = Literal["weighted", "zero"]
Scale = Literal["none", "vol"]
Output = Literal["r", "beta", "r2"]

MIN_WINDOW = 3
"""Shortest window a rolling or rank measure accepts."""

_KINDS: tuple[MeasureKind, ...] = ("rolling", "rank", "ewma")
_REGRESSION: tuple[Output, ...] = ("beta", "r2")
_WINDOW_OPTIONS = frozenset({"min", "scale"})
_EWMA_OPTIONS = frozenset({"hl", "lambda", "mean", "min", "scale"})
_SCALES: tuple[Scale, ...] = ("none", "vol")


def _number_text(value: float) -> str:
    """Shortest spelling of a float that parses back to the same float."""
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(value)


def max_effective_count(lam: float) -> float:
    """Largest Kish effective count of EWMA weights with decay ``lam``.

    ``(sum w)^2 / sum w^2`` with ``w_k = lam**k`` tends to ``(1 + lam) / (1 - lam)`` as the
    history grows (Kish 1965, Survey Sampling); it never reaches it.
    """
    return (1.0 + lam) / (1.0 - lam)


def default_ewma_min(half_life: float, lam: float) -> int:
    """Default minimum effective count of an EWMA measure (see the module docstring)."""
    reachable = max(1, math.floor(max_effective_count(lam)))
    return min(max(2, round(half_life)), reachable)


@dataclass(frozen=True)
class Measure:
    """A parsed measure spec.

    Attributes
    ----------
    kind : {"rolling", "rank", "ewma"}
    window : int or None
        Rows in the trailing window (rolling, rank); None for ewma.
    min_count : int
        Values whose count (rolling, rank) or effective count (ewma) is below this are NaN.
    half_life : float or None
        Half-life in rows (ewma); derived from ``lam`` when the spec gave ``lambda=``.
    lam : float or None
        Daily decay ``0.5 ** (1 / half_life)`` (ewma).
    mean : {"weighted", "zero"} or None
        ewma only: remove the weighted mean (as pandas' ``ewm().corr()``), or assume a zero
        mean (the recursion of risk practice).
    spelled : {"hl", "lambda"} or None
        Which of the two the spec gave, so that :attr:`text` spells it back the same way.
    scale : {"none", "vol"}
        ``vol``: the measure is computed on volatility-standardised returns.
    output : {"r", "beta", "r2"}
        The number reported: the correlation (``r``), the OLS slope of the second
        instrument's returns on the first's (``beta``) or its R squared (``r2``), all from
        the same window (``kind`` rolling) or weights (``kind`` ewma).
    """

    kind: MeasureKind
    window: int | None
    min_count: int
    half_life: float | None = None
    lam: float | None = None
    mean: MeanMode | None = None
    spelled: Literal["hl", "lambda"] | None = field(default=None, repr=False)
    scale: Scale = "none"
    output: Output = "r"

    @property
    def text(self) -> str:
        """Canonical spec; ``parse_measure(m.text) == m``."""
        text = self._pearson_text()
        if self.output == "r":
            return text
        return f"{self.output}:{text.partition(':')[2]}"

    @property
    def correlation(self) -> Measure:
        """The Pearson measure this one is computed from (itself when ``output`` is r)."""
        return self if self.output == "r" else dataclasses.replace(self, output="r")

    def _pearson_text(self) -> str:
        if self.kind != "ewma":
            parts = [f"{self.kind}:{self.window}"]
            if self.min_count != self.window:
                parts.append(f"min={self.min_count}")
            return ",".join(parts + self._scale_parts())
        if self.half_life is None or self.lam is None:
            raise EngineInputError(
                "an ewma Measure needs half_life and lam; build it with parse_measure")
        if self.spelled == "lambda":
            parts = [f"ewma:lambda={_number_text(self.lam)}"]
        else:
            parts = [f"ewma:hl={_number_text(self.half_life)}"]
        if self.mean == "zero":
            parts.append("mean=zero")
        if self.min_count != default_ewma_min(self.half_life, self.lam):
            parts.append(f"min={self.min_count}")
        return ",".join(parts + self._scale_parts())

    def _scale_parts(self) -> list[str]:
        return [] if self.scale == "none" else [f"scale={self.scale}"]

    @property
    def centred(self) -> bool:
        """True when the measure removes a mean (everything but ``ewma`` with ``mean=zero``)."""
        return self.mean != "zero"

    def __str__(self) -> str:
        return self.text


def _fail(text: str, problem: str) -> SpecError:
    return SpecError(f"measure {text!r}: {problem}")


def _parse_int(text: str, key: str, raw: str) -> int:
    try:
        return int(raw)
    except ValueError:
        raise _fail(text, f"{key} must be a whole number, got {raw!r}") from None


def _parse_float(text: str, key: str, raw: str) -> float:
    try:
        value = float(raw)
    except ValueError:
        raise _fail(text, f"{key} must be a number, got {raw!r}") from None
    if not math.isfinite(value):
        raise _fail(text, f"{key} must be finite, got {raw!r}")
    return value


def _options(text: str, items: list[str], allowed: frozenset[str]) -> dict[str, str]:
    options: dict[str, str] = {}
    for item in items:
        key, sep, raw = (part.strip() for part in item.partition("="))
        if not sep or not key or not raw:
            raise _fail(text, f"option {item.strip()!r} is not key=value")
        if key not in allowed:
            raise _fail(text, f"unknown option {key!r} (allowed: {', '.join(sorted(allowed))})")
        if key in options:
            raise _fail(text, f"option {key!r} given twice")
        options[key] = raw
    return options


def _parse_scale(text: str, options: dict[str, str]) -> Scale:
    raw = options.get("scale", "none")
    for scale in _SCALES:
        if raw == scale:
            return scale
    raise _fail(text, f"scale must be 'none' or 'vol', got {raw!r}")


def _parse_window(text: str, kind: MeasureKind, items: list[str]) -> Measure:
    window_raw = items[0].strip()
    if not window_raw or "=" in window_raw:
        raise _fail(text, f"{kind} needs a window first, as in {kind}:63")
    window = _parse_int(text, "window", window_raw)
    if window < MIN_WINDOW:
        raise _fail(text, f"window must be >= {MIN_WINDOW}, got {window}")
    options = _options(text, items[1:], _WINDOW_OPTIONS)
    min_count = window
    if "min" in options:
        min_count = _parse_int(text, "min", options["min"])
        if min_count < 2:
            raise _fail(text, f"min must be >= 2, got {min_count}")
        if min_count > window:
            raise _fail(text, f"min must be <= window {window}, got {min_count}")
    return Measure(
        kind=kind, window=window, min_count=min_count, scale=_parse_scale(text, options)
    )


def _parse_ewma(text: str, items: list[str]) -> Measure:
    options = _options(text, items, _EWMA_OPTIONS)
    if "hl" in options and "lambda" in options:
        raise _fail(text, "give hl= or lambda=, not both")
    spelled: Literal["hl", "lambda"]
    if "hl" in options:
        half_life = _parse_float(text, "hl", options["hl"])
        if half_life <= 0:
            raise _fail(text, f"hl must be > 0, got {options['hl']}")
        lam = 0.5 ** (1.0 / half_life)
        spelled = "hl"
        if not 0.0 < lam < 1.0:
            raise _fail(text, f"hl={options['hl']} gives a decay outside (0, 1)")
    elif "lambda" in options:
        lam = _parse_float(text, "lambda", options["lambda"])
        if not 0.0 < lam < 1.0:
            raise _fail(text, f"lambda must be in (0, 1), got {options['lambda']}")
        half_life = math.log(0.5) / math.log(lam)
        spelled = "lambda"
    else:
        raise _fail(text, "ewma needs hl=<days> or lambda=<decay>")
    mean_raw = options.get("mean", "weighted")
    if mean_raw not in ("weighted", "zero"):
        raise _fail(text, f"mean must be 'weighted' or 'zero', got {mean_raw!r}")
    mean: MeanMode = "zero" if mean_raw == "zero" else "weighted"
    min_count = default_ewma_min(half_life, lam)
    if "min" in options:
        min_count = _parse_int(text, "min", options["min"])
        reachable = max_effective_count(lam)
        if min_count < 1:
            raise _fail(text, f"min must be >= 1, got {min_count}")
        if min_count >= reachable:
            raise _fail(
                text,
                f"min={min_count} is never reached: the effective count stays below "
                f"(1 + lambda) / (1 - lambda) = {reachable:.4g}",
            )
    return Measure(
        kind="ewma",
        window=None,
        min_count=min_count,
        half_life=half_life,
        lam=lam,
        mean=mean,
        spelled=spelled,
        scale=_parse_scale(text, options),
    )


def parse_measure(text: str) -> Measure:
    """Parse a measure spec such as ``rolling:63`` or ``ewma:lambda=0.94,mean=zero``.

    Parameters
    ----------
    text : str
        The spec; blanks around the separators are ignored.

    Returns
    -------
    Measure

    Raises
    ------
    SpecError
        One line naming the spec and what is wrong with it.
    """
    if not isinstance(text, str):
        raise SpecError(f"measure spec must be text, got {type(text).__name__}")
    kind_raw, sep, rest = text.strip().partition(":")
    kind_word = kind_raw.strip()
    if not sep:
        raise _fail(text, "expected kind:parameters, as in rolling:63 or ewma:hl=21")
    items = rest.split(",")
    if kind_word in _REGRESSION:
        return _parse_regression(text, kind_word, items)
    if kind_word not in _KINDS:
        known = ", ".join(_KINDS + _REGRESSION)
        raise _fail(text, f"unknown kind {kind_word!r} (expected one of {known})")
    if kind_word == "ewma":
        return _parse_ewma(text, items)
    kind: MeasureKind = "rolling" if kind_word == "rolling" else "rank"
    return _parse_window(text, kind, items)


def _parse_regression(text: str, word: str, items: list[str]) -> Measure:
    """``beta:...`` / ``r2:...``: a rolling window or EWMA weights, without ``scale=``."""
    output: Output = "beta" if word == "beta" else "r2"
    if any(item.partition("=")[0].strip() == "scale" for item in items):
        raise _fail(text, f"{word} does not take scale= (it is computed on the returns)")
    first = items[0].partition("=")[0].strip()
    if first in ("hl", "lambda"):
        base = _parse_ewma(text, items)
    else:
        base = _parse_window(text, "rolling", items)
    return dataclasses.replace(base, output=output)


def window_problem(measure: Measure, max_window: int) -> str | None:
    """Why `measure` reaches further back than `max_window` rows, or None when it does not.

    A rolling or rank window, or an EWMA half-life, above the desk's maximum is refused:
    such a measure holds that many rows per pair and shows nothing until they exist.
    """
    if measure.window is not None and measure.window > max_window:
        return (f"measure {measure.text} has a window of {measure.window} rows, more than "
                f"correlation.max_window ({max_window})")
    if measure.half_life is not None and measure.half_life > max_window:
        return (f"measure {measure.text} has a half-life of {measure.half_life:g} days, more "
                f"than correlation.max_window ({max_window})")
    return None


def as_measure(measure: Measure | str) -> Measure:
    """Accept a parsed measure or its text."""
    return measure if isinstance(measure, Measure) else parse_measure(measure)
