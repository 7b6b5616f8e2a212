"""One day's inputs to the rules and the condition arrays a rule returns.

How the pipeline feeds the rules
--------------------------------
Before the run, the pipeline asks the rules what they read
(:func:`monitor.rules.registry.measures_needed`, ``lags_needed``, ``pairs_needed``):

* ``measures_needed(rules)`` — canonical measure texts (``rolling:63``, ``ewma:hl=21``);
  the engine is run once per text.
* ``pairs_needed(rules)`` — the union (P_all, 2) of every pair a rule reads, ``i < j``;
  the engine may compute exactly these, or full (N, N) matrices.
* ``lags_needed(rules)`` — ``(measure text, lag)`` couples: the value of that measure
  ``lag`` business days before the day being evaluated (``jump`` needs ``days`` ago,
  an ``adjacent`` shift needs the window that ended ``window`` days ago). The pipeline keeps
  a ring buffer of ``max(lag) + 1`` days of engine output per measure.

Then for every business day it builds one :class:`DayInputs`:

* ``measures[text]`` — anything with ``value``, ``n``, ``low``, ``high`` and ``stale``
  arrays (:class:`MeasureLike`: the engine's per-day result as it comes, or a
  :class:`MeasureDay`), either (P_all,) aligned to ``layout.pairs`` (one
  :class:`~monitor.rules.targets.PairLayout` built once per run and reused every day) or
  full (N, N) matrices (``layout`` may then be None). Rules read ``low`` / ``high`` only
  when they need the band (``require_band`` levels, ``sign``) or when an event reports it, so
  a lazily computed band is not forced on quiet days.
* ``lagged[(text, lag)]`` — the same, as it stood ``lag`` business days earlier; before the
  history is that long, pass :meth:`MeasureDay.missing` (all NaN), never leave it out.
* ``days_without_close`` / ``days_unchanged`` (N,) — for ``stale`` rules: business days
  since each instrument's last new close, and business days its close has not changed
  (NaN for an instrument with no close yet).

A missing key is a wiring error and raises ``KeyError`` naming it. Group averages are not
an input: a group-average rule averages its group's pairs from ``measures`` itself.
"""

from __future__ import annotations

import datetime
import functools
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import numpy.typing as npt

from monitor._typing import Float1D
from monitor.rules.stats import two_sided_p
from monitor.rules.targets import IntArray, PairLayout

BoolArray = npt.NDArray[np.bool_]
Float2D = npt.NDArray[np.float64]


class MeasureLike(Protocol):
    """One measure on one day: arrays of one shape, (P_all,) or (N, N)."""

    @property
    def value(self) -> Float1D:
        """Correlation in [-1, 1]; NaN where it cannot be computed."""
        ...

    @property
    def n(self) -> Float1D:
        """Observation count, or Kish effective count for EWMA."""
        ...

    @property
    def low(self) -> Float1D:
        """Lower end of the confidence band; NaN where not available."""
        ...

    @property
    def high(self) -> Float1D:
        """Upper end of the confidence band; NaN where not available."""
        ...

    @property
    def stale(self) -> BoolArray:
        """Zero-variance window (``value`` is then NaN)."""
        ...


@dataclass(frozen=True)
class MeasureDay:
    """A plain :class:`MeasureLike` holding its arrays.

    Attributes
    ----------
    value : float array (P_all,) or (N, N)
        Correlation in [-1, 1]; NaN where it cannot be computed.
    n : float array, same shape
        Observation count, or Kish effective count for EWMA.
    low, high : float array, same shape
        Confidence band around ``value``; NaN where not available.
    stale : bool array, same shape
        Zero-variance window (``value`` is then NaN).
    """

    value: Float1D
    n: Float1D
    low: Float1D
    high: Float1D
    stale: BoolArray

    @classmethod
    def missing(cls, shape: int | tuple[int, ...]) -> MeasureDay:
        """All-NaN stand-in for a day the history does not reach yet."""
        nan = np.broadcast_to(np.float64(np.nan), shape)
        return cls(value=nan, n=nan, low=nan, high=nan, stale=np.broadcast_to(False, shape))


class PickedMeasure:
    """Some pairs (M,) of a :class:`MeasureLike`, each array gathered on first use."""

    def __init__(self, source: MeasureLike, rows: IntArray, *, matrix: bool) -> None:
        self._source = source
        self._rows = rows
        self._matrix = matrix

    def _pick(self, array: npt.NDArray[np.generic]) -> npt.NDArray[np.generic]:
        return np.take(np.ravel(array) if self._matrix else array, self._rows)

    @functools.cached_property
    def value(self) -> Float1D:
        return np.asarray(self._pick(self._source.value), dtype=np.float64)

    @functools.cached_property
    def n(self) -> Float1D:
        return np.asarray(self._pick(self._source.n), dtype=np.float64)

    @functools.cached_property
    def low(self) -> Float1D:
        return np.asarray(self._pick(self._source.low), dtype=np.float64)

    @functools.cached_property
    def high(self) -> Float1D:
        return np.asarray(self._pick(self._source.high), dtype=np.float64)

    @functools.cached_property
    def stale(self) -> BoolArray:
        return np.asarray(self._pick(self._source.stale), dtype=bool)


def take_pairs(measure: MeasureLike, pairs: IntArray, layout: PairLayout | None) -> MeasureLike:
    """The rows of ``pairs`` (M, 2) of a measure, as arrays (M,).

    Returns ``measure`` itself when its arrays already follow exactly these pairs.

    Raises
    ------
    ValueError
        Per-pair arrays without a layout, or a pair missing from the layout.
    """
    value = measure.value
    if value.ndim == 2:
        # (N, N) matrices are C-contiguous, so ravel is a view and i*N + j its index.
        flat = pairs[:, 0] * value.shape[1] + pairs[:, 1]
        return PickedMeasure(measure, flat, matrix=True)
    if layout is None:
        raise ValueError("per-pair measure arrays need DayInputs.layout")
    rows = layout.positions(pairs)
    return measure if rows is None else PickedMeasure(measure, rows, matrix=False)


@dataclass(frozen=True)
class DayInputs:
    """Everything the rules read for one business day (see the module docstring).

    Attributes
    ----------
    date : datetime.date
        The business day evaluated.
    measures : mapping of str to MeasureLike
        Keyed by canonical measure text.
    layout : PairLayout or None
        The pair list per-pair arrays follow; None when all arrays are (N, N).
    lagged : mapping of (str, int) to MeasureLike
        ``(measure text, lag)`` -> the measure ``lag`` business days earlier.
    days_without_close, days_unchanged : float array (N,) or None
        Inputs of ``stale`` rules; NaN for an instrument with no close yet.
    scaled_history : float array (L, N) or None
        Standardised returns (:func:`monitor.engine.pairdates.own_standardise`): column i
        holds instrument i's last L own returns up to ``date`` (last row = its latest), L
        the largest ``Rule.history_rows()``; NaN above its first. None when no rule reads
        them.
    scaled_pairs : callable or None
        ``scaled_pairs(pairs) -> (x, y)``, each (L, M): the same standardised returns on
        each pair's own last L dates (both sides have a return), for rules that correlate
        them. None: the rows of ``scaled_history`` are used as they stand.
    """

    date: datetime.date
    measures: Mapping[str, MeasureLike]
    layout: PairLayout | None = None
    lagged: Mapping[tuple[str, int], MeasureLike] = field(default_factory=dict)
    days_without_close: Float1D | None = None
    days_unchanged: Float1D | None = None
    scaled_history: npt.NDArray[np.float64] | None = None
    scaled_pairs: Callable[[IntArray], tuple[Float2D, Float2D]] | None = None

    def pair_history(self, pairs: IntArray) -> tuple[Float2D, Float2D]:
        """Standardised returns (L, M) of both sides of ``pairs`` on the pairs' own dates;
        KeyError when the day has no standardised history."""
        if self.scaled_pairs is not None:
            return self.scaled_pairs(pairs)
        if self.scaled_history is None:
            raise KeyError("DayInputs.scaled_history is missing")
        history = np.asarray(self.scaled_history, dtype=np.float64)
        return np.take(history, pairs[:, 0], axis=1), np.take(history, pairs[:, 1], axis=1)

    def measure(self, text: str, pairs: IntArray) -> MeasureLike:
        """Measure ``text`` today at ``pairs`` (M, 2); KeyError when not supplied."""
        if text not in self.measures:
            raise KeyError(f"DayInputs.measures has no {text!r}")
        return take_pairs(self.measures[text], pairs, self.layout)

    def lagged_measure(self, text: str, lag: int, pairs: IntArray) -> MeasureLike:
        """Measure ``text`` ``lag`` business days ago at ``pairs``; KeyError when absent."""
        if (text, lag) not in self.lagged:
            raise KeyError(f"DayInputs.lagged has no ({text!r}, {lag})")
        return take_pairs(self.lagged[(text, lag)], pairs, self.layout)


def _filled(values: npt.ArrayLike | None, size: int) -> Float1D:
    """A (size,) float view: NaN when None, a read-only broadcast for a scalar."""
    if values is None:
        return np.broadcast_to(np.float64(np.nan), (size,))
    array = np.asarray(values, dtype=np.float64)
    return np.broadcast_to(array, (size,)) if array.ndim == 0 else array


@dataclass(frozen=True)
class Condition:
    """What one rule found today, one entry per target of the rule (P_rule,).

    Attributes
    ----------
    breach : bool array
        Beyond the opening level today.
    clear : bool array
        Past the clearing level today, i.e. safe; never True where ``breach`` is.
    known : bool array
        The condition could be evaluated. Where False (NaN inputs) both ``breach`` and
        ``clear`` are False: an open alert stays open and a breach streak neither grows
        nor breaks.
    value : float array
        The measure's value today (group-average: the group average; stale: days without a fresh
        close).
    level : float array
        The opening level (level, group-average), z threshold (shift), ``delta`` (jump),
        0 (sign), ``days`` (stale).
    excess : float array
        How far beyond the opening level, positive when breached; the alert book keeps the
        value at the largest excess as the alert's peak.
    z : float array
        Shift statistic; NaN for other kinds.
    reference : float array
        What ``value`` is compared against: the long-window or previous-window correlation
        (shift), the value ``days`` ago (jump); NaN for other kinds.
    source : MeasureLike or None
        The measure ``low``, ``high`` and ``n`` are read from.
    count : float array or None
        ``n`` when it is not the measure's (group-average: pairs averaged).

    Notes
    -----
    ``low``, ``high`` and ``n`` (confidence band and observation count of ``value``) and
    ``p`` (two-sided p-value of ``z``) are properties computed on first use: the daily path
    needs them only at the few targets with an event.
    """

    breach: BoolArray
    clear: BoolArray
    known: BoolArray
    value: Float1D
    level: Float1D
    excess: Float1D
    z: Float1D
    reference: Float1D
    source: MeasureLike | None = None
    count: Float1D | None = None

    @classmethod
    def build(
        cls,
        *,
        breach: BoolArray,
        clear: BoolArray,
        known: BoolArray,
        value: Float1D,
        level: npt.ArrayLike,
        excess: Float1D,
        source: MeasureLike | None = None,
        n: npt.ArrayLike | None = None,
        z: npt.ArrayLike | None = None,
        reference: npt.ArrayLike | None = None,
    ) -> Condition:
        """Assemble a condition, filling what is not relevant with NaN (no copies)."""
        size = value.shape[0]
        return cls(
            breach=breach,
            clear=clear,
            known=known,
            value=value,
            level=_filled(level, size),
            excess=excess,
            z=_filled(z, size),
            reference=_filled(reference, size),
            source=source,
            count=None if n is None else _filled(n, size),
        )

    def __len__(self) -> int:
        return int(self.value.shape[0])

    @functools.cached_property
    def low(self) -> Float1D:
        """Lower end of the confidence band of ``value`` (P,); NaN where not relevant."""
        return _filled(None if self.source is None else self.source.low, len(self))

    @functools.cached_property
    def high(self) -> Float1D:
        """Upper end of the confidence band of ``value`` (P,); NaN where not relevant."""
        return _filled(None if self.source is None else self.source.high, len(self))

    @functools.cached_property
    def n(self) -> Float1D:
        """Observation count behind ``value`` (P,); NaN where not relevant."""
        if self.count is not None:
            return self.count
        return _filled(None if self.source is None else self.source.n, len(self))

    @functools.cached_property
    def p(self) -> Float1D:
        """Two-sided p-value of ``z`` (P,); NaN where ``z`` is NaN."""
        return two_sided_p(self.z)
