"""Pandas in, pandas out: the engine and the rules on DataFrames, without a store.

For a notebook or a script: closes to returns (:func:`returns`), correlations of pairs as a
long table (:func:`correlations`), one day's correlation matrix (:func:`matrix`) and the
alert events the desk's rules would raise over a history (:func:`evaluate`).

Inputs are checked here, once, at the edge (a DataFrame whose index is dates, ascending and
unique, with one numeric column per instrument); the engine, the rules and the replay see
plain float64 arrays and column positions, and the labels (dates, symbols, ``"A/B"`` pair
names) are put back on the results at the end. :func:`evaluate` runs the same replay as the
backfill (:func:`monitor.alerts.replay.replay` with a fresh
:class:`~monitor.alerts.book.AlertBook`), so its events are the ones ``comove backfill``
stores for the same rules and returns.

Every problem with an argument raises :class:`~monitor.errors.ConfigError` with one line
naming the function, the argument and the bad value.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Hashable, Iterable, Mapping, Sequence
from typing import Any, cast

import numpy as np
import pandas as pd

from monitor._typing import ReturnKind
from monitor.alerts.book import AlertBook, AlertEvent
from monitor.alerts.replay import make_plan, replay
from monitor.data.quality import stale_inputs
from monitor.data.returns import DEFAULT_MAX_GAP, closes_to_returns
from monitor.engine import DEFAULT_LEVEL, Measure, fisher_band, parse_measure, stream
from monitor.engine.bands import check_level
from monitor.engine.pairdates import stream_on_pair_dates
from monitor.engine.regression import regression_band
from monitor.errors import ConfigError, EngineInputError, SpecError
from monitor.rules.registry import build_rules

DEFAULT_MEASURE = "rolling:63"
"""Measure of :func:`correlations`, :func:`matrix` and of rules that name none; the same as
the settings' ``[correlation] default_measure`` default (a test keeps them equal)."""

CORRELATION_COLUMNS = ("date", "pair", "value", "low", "high", "n", "stale")
"""Columns of :func:`correlations`."""

EVENT_COLUMNS = (
    "date", "rule", "target", "event", "severity", "value", "level", "low", "high", "n",
    "z", "p", "reference", "opened", "first_breach", "peak_value", "peak_date", "days_held",
    "reminder", "rule_kind", "symbols",
)
"""Columns of :func:`evaluate`."""


def _fail(function: str, argument: str, message: str) -> ConfigError:
    return ConfigError(f"{function}: {argument}: {message}")


def _shown(values: Iterable[object], most: int = 5) -> str:
    items = [repr(v) for v in values]
    more = f" and {len(items) - most} more" if len(items) > most else ""
    return ", ".join(items[:most]) + more


def _date_index(frame: pd.DataFrame, function: str, argument: str) -> pd.DatetimeIndex:
    """The frame's index as a DatetimeIndex, checked: dates, no time of day, ascending, unique."""
    index = frame.index
    if isinstance(index, pd.DatetimeIndex):
        dates = index
    elif len(index) and all(
        isinstance(v, dt.date) and not isinstance(v, dt.datetime) for v in index
    ):
        dates = pd.DatetimeIndex(pd.to_datetime(list(index)))
    elif len(index) == 0:
        dates = pd.DatetimeIndex([])
    else:
        first = next((v for v in index if not isinstance(v, dt.date)), index[0])
        raise _fail(function, argument, f"the index must be dates (a DatetimeIndex or "
                    f"datetime.date values), found {first!r}; try pd.to_datetime(index)")
    if dates.hasnans:
        raise _fail(function, argument, "the index has a missing date (NaT)")
    if len(dates) and not dates.equals(dates.normalize()):
        where = dates[dates != dates.normalize()][0]
        raise _fail(function, argument, f"the index has a time of day ({where}); one row per "
                    "date is expected (index.normalize())")
    if not dates.is_unique:
        raise _fail(function, argument,
                    f"the index has a repeated date {dates[dates.duplicated()][0].date()}")
    if not dates.is_monotonic_increasing:
        at = int(np.flatnonzero(np.diff(dates.asi8) < 0)[0]) + 1
        raise _fail(function, argument, f"the dates are not ascending ({dates[at].date()} "
                    f"follows {dates[at - 1].date()}); sort_index() first")
    return dates


def _checked(
    frame: object, function: str, argument: str, *, positive: bool = False
) -> tuple[pd.DatetimeIndex, list[str], np.ndarray]:
    """Check a panel at the edge: dates, symbols and a float64 (T, N) array (NaN = missing).

    Raises ConfigError for another type, a bad index, column labels that are not distinct
    symbols without ``/``, a non-numeric column, an infinite value, or (``positive``) a
    close <= 0.
    """
    if not isinstance(frame, pd.DataFrame):
        raise _fail(function, argument, f"expected a pandas DataFrame (dates x symbols), got "
                    f"{type(frame).__name__}")
    dates = _date_index(frame, function, argument)
    symbols: list[str] = []
    for label in frame.columns:
        if not isinstance(label, str) or not label or "/" in label:
            raise _fail(function, argument, f"column {label!r} is not a symbol (a non-empty "
                        "string without '/')")
        symbols.append(label)
    if len(set(symbols)) != len(symbols):
        repeated = sorted({s for s in symbols if symbols.count(s) > 1})
        raise _fail(function, argument, f"repeated column {_shown(repeated)}")
    for symbol in symbols:
        dtype = frame[symbol].dtype
        if pd.api.types.is_bool_dtype(dtype) or not pd.api.types.is_numeric_dtype(dtype):
            raise _fail(function, argument, f"column {symbol!r} is {dtype}, not numbers")
    values = frame.to_numpy(dtype=np.float64, na_value=np.nan)
    bad = np.isinf(values)
    if positive:
        with np.errstate(invalid="ignore"):
            bad |= values <= 0.0
    if bad.any():
        row, col = (int(k) for k in np.argwhere(bad)[0])
        what = "a close must be > 0" if positive and np.isfinite(values[row, col]) else (
            "missing values must be NaN, not inf")
        raise _fail(function, argument, f"{symbols[col]} on {dates[row].date()} is "
                    f"{float(values[row, col])!r}; {what}")
    return dates, symbols, values


def _measure(function: str, measure: object, argument: str = "measure") -> Measure:
    if isinstance(measure, Measure):
        return measure
    if not isinstance(measure, str):
        raise _fail(function, argument, f"expected a spec such as 'rolling:63' or "
                    f"'ewma:hl=21', got {measure!r}")
    try:
        return parse_measure(measure)
    except SpecError as exc:
        raise SpecError(f"{function}: {argument}: {exc}") from None


def _level(function: str, level: object) -> float:
    if isinstance(level, bool):
        raise _fail(function, "level", f"expected a number in (0, 1), got {level!r}")
    try:
        return check_level(level)  # type: ignore[arg-type]
    except EngineInputError:
        raise _fail(function, "level", f"expected a number in (0, 1), got {level!r}") from None


def _whole(function: str, argument: str, value: object, least: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < least:
        raise _fail(function, argument, f"expected a whole number >= {least}, got {value!r}")
    return int(value)


def _pair_list(
    pairs: object, symbols: Sequence[str], function: str
) -> tuple[np.ndarray, list[str]]:
    """Pairs as (P, 2) column positions and their labels ``"A/B"`` in the caller's order.

    None gives every pair ``i < j`` in column order. A single ``"A/B"`` text is one pair.
    """
    position = {symbol: k for k, symbol in enumerate(symbols)}
    if pairs is None:
        first, second = np.triu_indices(len(symbols), k=1)
        columns = zip(first.tolist(), second.tolist(), strict=True)
        labels = [f"{symbols[i]}/{symbols[j]}" for i, j in columns]
        return np.column_stack([first, second]).astype(np.int64), labels
    items = [pairs] if isinstance(pairs, str) else pairs
    if not isinstance(items, Iterable) or isinstance(items, Mapping):
        raise _fail(function, "pairs", f"expected 'A/B' texts or (a, b) tuples, got {pairs!r}")
    couples: list[tuple[str, str]] = []
    for item in items:
        if isinstance(item, str):
            parts = [part.strip() for part in item.split("/")]
        elif isinstance(item, tuple | list) and all(isinstance(p, str) for p in item):
            parts = [str(p) for p in item]
        else:
            parts = []
        if len(parts) != 2 or not all(parts):
            raise _fail(function, "pairs", f"{item!r} is not a pair ('A/B' or (a, b))")
        if parts[0] == parts[1]:
            raise _fail(function, "pairs", f"{item!r} pairs an instrument with itself")
        couples.append((parts[0], parts[1]))
    unknown = list(dict.fromkeys(s for couple in couples for s in couple if s not in position))
    if unknown:
        raise _fail(function, "pairs", f"unknown symbol {_shown(unknown)} (columns: "
                    f"{_shown(symbols, 8)})")
    index = np.array([[position[a], position[b]] for a, b in couples], dtype=np.int64)
    return index.reshape(-1, 2), [f"{a}/{b}" for a, b in couples]


def _stamp(dates: pd.DatetimeIndex, when: object, function: str, argument: str) -> pd.Timestamp:
    """``when`` as a midnight Timestamp in the index's time zone, or a ConfigError."""
    try:
        stamp = pd.Timestamp(when)
    except (TypeError, ValueError):
        raise _fail(function, argument, f"{when!r} is not a date") from None
    if pd.isna(stamp) or stamp != stamp.normalize():
        raise _fail(function, argument, f"{when!r} is not a date")
    if dates.tz is not None and stamp.tz is None:
        stamp = stamp.tz_localize(dates.tz)
    return stamp


def _row(dates: pd.DatetimeIndex, when: object, function: str, argument: str,
         side: str) -> int:
    """Row of the first date >= ``when`` (``side="left"``), or one past the last <= it."""
    stamp = _stamp(dates, when, function, argument)
    return int(dates.searchsorted(stamp, side=side))


def returns(
    closes: pd.DataFrame,
    kind: ReturnKind = "log",
    horizon: int = 1,
    fill_limit: int = 0,
    max_gap: int = DEFAULT_MAX_GAP,
) -> pd.DataFrame:
    """Returns of a closes panel, as the settings' ``[returns]`` section computes them.

    Parameters
    ----------
    closes : DataFrame (T, N)
        Index: dates (DatetimeIndex or ``datetime.date``), ascending and unique; one numeric
        column of closes per symbol, NaN where there is no close; closes must be > 0.
    kind : {"log", "simple"}
        ``log(c_t / c_prev)`` or ``c_t / c_prev - 1``, ``c_prev`` the instrument's own
        previous close (``h`` rows back for a horizon ``h``).
    horizon : int
        ``h >= 1``; above 1, non-overlapping h-day returns dated at the end of each span,
        counted back from the last row.
    fill_limit : int
        ``k >= 0``: a missing close is carried forward for at most k rows.
    max_gap : int
        ``g >= 1``: a return spans the days without a close back to the previous close when
        that is at most ``g`` business days back; further back it is missing.

    Returns
    -------
    DataFrame (T - 1, N) for ``h = 1``, same columns and index labels as ``closes`` (from its
    second row). NaN on a date without a close, at the first close and after a gap longer
    than ``max_gap``: a missing close never becomes a zero return.

    Raises
    ------
    ConfigError
        A bad panel or argument, naming it.
    """
    _checked(closes, "returns", "closes", positive=True)
    if kind not in ("log", "simple"):
        raise _fail("returns", "kind", f"{kind!r} is not one of 'log', 'simple'")
    horizon = _whole("returns", "horizon", horizon, 1)
    fill_limit = _whole("returns", "fill_limit", fill_limit, 0)
    max_gap = _whole("returns", "max_gap", max_gap, 1)
    return closes_to_returns(closes, kind=kind, horizon=horizon, fill_limit=fill_limit,
                             max_gap=max_gap)


def correlations(
    returns: pd.DataFrame,
    measure: str = DEFAULT_MEASURE,
    pairs: Iterable[str | tuple[str, str]] | str | None = None,
    level: float = DEFAULT_LEVEL,
    *,
    start: object = None,
    end: object = None,
) -> pd.DataFrame:
    """Correlation of pairs day by day, as a long table.

    Parameters
    ----------
    returns : DataFrame (T, N)
        Returns (see :func:`returns`), dates ascending and unique, NaN = missing. Each pair
        uses the days on which both have a return.
    measure : str
        ``rolling:W``, ``rank:W``, ``ewma:hl=H``, ``ewma:lambda=L[,mean=zero]``, optionally
        with ``,min=M`` (see README, Measures).
    pairs : iterable of "A/B" or (a, b), or None
        The pairs, labelled as given; None: every pair of columns, in column order.
    level : float
        Confidence level of the Fisher z band, in (0, 1).
    start, end : date-like or None
        Keep the rows from ``start`` to ``end`` (both included). Earlier rows still serve as
        the window's (or the EWMA's) history, so a value does not depend on ``start``.

    Returns
    -------
    DataFrame with one row per date and pair (date-major, pairs in the given order) and
    columns ``date`` (the index labels of ``returns``), ``pair`` ("A/B"), ``value`` (in
    [-1, 1]), ``low`` and ``high`` (the band; NaN where ``n <= 3``), ``n`` (common
    returns in the window, or the Kish effective count of an EWMA) and ``stale`` (one
    side did not move in the window). ``value`` is NaN below the measure's minimum count
    and where ``stale``.

    Raises
    ------
    ConfigError
        A bad panel, measure, pair, level or date, naming it (``SpecError`` for a measure).
    """
    name = "correlations"
    dates, symbols, values = _checked(returns, name, "returns")
    spec = _measure(name, measure)
    confidence = _level(name, level)
    index, labels = _pair_list(pairs, symbols, name)
    first = 0 if start is None else _row(dates, start, name, "start", "left")
    stop = len(dates) if end is None else _row(dates, end, name, "end", "right")
    stop = max(first, stop)
    days = stop - first
    value = np.empty((days, len(labels)))
    count = np.empty((days, len(labels)))
    stale = np.empty((days, len(labels)), dtype=bool)
    r = np.full((days, len(labels)), np.nan)
    ratio = np.full((days, len(labels)), np.nan)
    if len(labels):
        results = stream_on_pair_dates(values, spec, index, start=first, stop=stop,
                                       level=confidence)
        for k, day in enumerate(results):
            value[k], count[k], stale[k] = day.value, day.n, day.stale
            if day.r is not None and day.ratio is not None:
                r[k], ratio[k] = day.r, day.ratio
    # One band over the whole table: the same function the engine's day results use.
    if spec.output == "r":
        low, high = fisher_band(value, count, confidence)
    else:
        low, high = regression_band(spec, value, r, ratio, count, confidence)
    return pd.DataFrame({
        "date": np.repeat(returns.index[first:stop].to_numpy(), len(labels)),
        "pair": np.tile(np.array(labels, dtype=object), days),
        "value": value.ravel(),
        "low": low.ravel(),
        "high": high.ravel(),
        "n": count.ravel(),
        "stale": stale.ravel(),
    }, columns=list(CORRELATION_COLUMNS))


def matrix(
    returns: pd.DataFrame, measure: str = DEFAULT_MEASURE, on: object = None
) -> pd.DataFrame:
    """The correlation matrix of every column on one date.

    Parameters
    ----------
    returns : DataFrame (T, N)
        Returns, dates ascending and unique, NaN = missing.
    measure : str
        Measure spec, as in :func:`correlations`.
    on : date-like or None
        A date of the index; None: the last one. Only rows up to it are read.

    Returns
    -------
    DataFrame (N, N), index and columns the symbols; each pair on its own dates (the rows
    where both have a return), as :func:`correlations` gives it. The diagonal is 1 (NaN for a column
    that did not move); NaN below the measure's minimum count of common returns.

    Raises
    ------
    ConfigError
        A bad panel or measure, an empty panel, or ``on`` not a date of the index.
    """
    name = "matrix"
    dates, symbols, values = _checked(returns, name, "returns")
    spec = _measure(name, measure)
    if not len(dates):
        raise _fail(name, "returns", "has no rows")
    if on is None:
        t = len(dates) - 1
    else:
        t = int(dates.get_indexer([_stamp(dates, on, name, "on")])[0])
        if t < 0:
            raise _fail(name, "on", f"{on!r} is not a date of the returns ({dates[0].date()} "
                        f"to {dates[-1].date()})")
    size = len(symbols)
    first, second = np.triu_indices(size, k=1)
    index = np.column_stack([first, second]).astype(np.int64)
    day = next(stream_on_pair_dates(values[:t + 1], spec, index, start=t))
    table = np.full((size, size), np.nan)
    table[first, second] = table[second, first] = day.value
    # The diagonal: 1 where the column moved in the window (as the engine's matrix has it).
    diagonal = next(stream(values[:t + 1], spec, start=t)).value.diagonal()
    table[np.arange(size), np.arange(size)] = diagonal
    return pd.DataFrame(table, index=returns.columns, columns=returns.columns)


def _group_tables(groups: object, symbols: Sequence[str]) -> dict[str, list[str]]:
    """``{symbol: group}`` turned into ``{group: [symbols in column order]}``."""
    if groups is None:
        return {}
    if not isinstance(groups, Mapping):
        raise _fail("evaluate", "groups", f"expected a mapping symbol -> group name, got "
                    f"{type(groups).__name__}")
    unknown = [s for s in groups if s not in symbols]
    if unknown:
        raise _fail("evaluate", "groups", f"unknown symbol {_shown(unknown)} (columns: "
                    f"{_shown(symbols, 8)})")
    tables: dict[str, list[str]] = {}
    for symbol in symbols:
        if symbol not in groups:
            continue
        group = groups[symbol]
        if not isinstance(group, str) or not group:
            raise _fail("evaluate", "groups", f"group of {symbol!r} is {group!r}, not a name")
        tables.setdefault(group, []).append(symbol)
    return tables


def _stale_counts(
    closes: object, dates: pd.DatetimeIndex, symbols: Sequence[str]
) -> tuple[np.ndarray, np.ndarray]:
    """The stale rule's two counts per returns row, from the closes (as the pipeline does)."""
    close_dates, close_symbols, _ = _checked(closes, "evaluate", "closes", positive=True)
    missing = [s for s in symbols if s not in close_symbols]
    if missing:
        raise _fail("evaluate", "closes", f"no column for {_shown(missing)}")
    panel = cast(pd.DataFrame, closes)  # _checked has made sure of it
    without, unchanged = stale_inputs(panel[list(symbols)])
    rows = close_dates.get_indexer(dates)
    if (rows < 0).any():
        day = dates[int(np.flatnonzero(rows < 0)[0])].date()
        raise _fail("evaluate", "closes", f"no row for {day}, a date of the returns")
    return without[rows], unchanged[rows]


def _event_rows(events: list[AlertEvent], labels: Mapping[dt.date, Hashable],
                symbols: Sequence[str]) -> dict[str, list[Any]]:
    columns: dict[str, list[Any]] = {name: [] for name in EVENT_COLUMNS}
    for e in events:
        row = {
            "date": labels[e.date], "rule": e.rule, "target": e.target, "event": e.event,
            "severity": e.severity, "value": e.value, "level": e.level, "low": e.low,
            "high": e.high, "n": e.n, "z": e.z, "p": e.p, "reference": e.reference,
            "opened": labels[e.opened], "first_breach": labels[e.first_breach],
            "peak_value": e.peak_value, "peak_date": labels[e.peak_date],
            "days_held": e.days_held, "reminder": e.reminder, "rule_kind": e.rule_kind,
            "symbols": tuple(symbols[k] for k in e.symbols),
        }
        for name in EVENT_COLUMNS:
            columns[name].append(row[name])
    return columns


def evaluate(
    returns: pd.DataFrame,
    rules: Sequence[Mapping[str, object]] | Mapping[str, object],
    groups: Mapping[str, str] | None = None,
    *,
    closes: pd.DataFrame | None = None,
    level: float = DEFAULT_LEVEL,
    default_measure: str = DEFAULT_MEASURE,
) -> pd.DataFrame:
    """Replay the rules over the returns, day by day, and list the alert events.

    The same replay as ``comove backfill`` (rules built by
    :func:`monitor.rules.build_rules`, stepped by :func:`monitor.alerts.replay.replay` into
    a fresh :class:`~monitor.alerts.book.AlertBook`), without mutes or acknowledgements.

    Parameters
    ----------
    returns : DataFrame (T, N)
        Returns, dates ascending and unique, NaN = missing; the columns are the desk's
        instruments.
    rules : sequence of dict (or one dict)
        Rule tables with the keys of the settings file's ``[[rules]]`` tables
        (``name``, ``kind``, ``measure``, ``pairs``, ``below``, ``hold``, ...).
    groups : mapping symbol -> group name, optional
        The instruments' groups, for rules that name a ``group`` or ``between``.
    closes : DataFrame, optional
        The closes behind ``returns`` (a row for every date of ``returns``); needed only by
        ``stale`` rules, which count days without a new or a changed close.
    level : float
        Confidence level of the bands (and of ``require_band`` level rules), in (0, 1).
    default_measure : str
        Measure of a rule without ``measure``.

    Returns
    -------
    DataFrame, one row per event in date order (rules in the given order within a day):
    ``date``, ``rule``, ``target`` ("A/B", symbol or group), ``event`` ("opened",
    "continuing" = a reminder, "cleared"), ``severity``, the condition's ``value`` and
    opening ``level``, the band ``low`` / ``high`` and ``n``, ``z`` and ``p`` (shift rules),
    ``reference`` (the long or previous window, or the value ``days`` ago), ``opened`` and
    ``first_breach`` dates of the alert, ``peak_value`` / ``peak_date``, ``days_held``,
    ``reminder``, ``rule_kind`` and ``symbols`` (tuple of the target's instruments).
    Figures a rule kind does not have are NaN. Date columns carry the index labels of
    ``returns``.

    Raises
    ------
    ConfigError
        A bad panel, rule table (one line naming the rule and the key), group, level or
        measure; a ``stale`` rule without ``closes``.
    """
    name = "evaluate"
    dates, symbols, values = _checked(returns, name, "returns")
    confidence = _level(name, level)
    _measure(name, default_measure, "default_measure")
    tables = [rules] if isinstance(rules, Mapping) else rules
    if isinstance(tables, str) or not isinstance(tables, Sequence):
        raise _fail(name, "rules", f"expected a list of rule tables (dicts), got "
                    f"{type(rules).__name__}")
    built = build_rules(list(tables), symbols=symbols, groups=_group_tables(groups, symbols),
                        default_measure=default_measure)
    without = unchanged = None
    stale_rules = [rule.name for rule in built if rule.kind == "stale"]
    if closes is not None:
        without, unchanged = _stale_counts(closes, dates, symbols)
    elif stale_rules:
        raise _fail(name, "closes", f"rule {stale_rules[0]!r} is a stale rule, which reads "
                    "the closes: pass closes=")
    days = [stamp.date() for stamp in dates]
    labels = dict(zip(days, returns.index, strict=True))
    plan = make_plan(built, symbols, level=confidence)
    events: list[AlertEvent] = []
    for day in replay(values, days, plan, AlertBook(), days_without_close=without,
                      days_unchanged=unchanged):
        events.extend(day.events)
    frame = pd.DataFrame(_event_rows(events, labels, symbols), columns=list(EVENT_COLUMNS))
    for column in ("value", "level", "low", "high", "n", "z", "p", "reference", "peak_value"):
        frame[column] = frame[column].astype(np.float64)
    frame["days_held"] = frame["days_held"].astype(np.int64)
    frame["reminder"] = frame["reminder"].astype(bool)
    return frame


__all__ = ["correlations", "evaluate", "matrix", "returns"]
