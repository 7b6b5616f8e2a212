"""The engine's entry points: stream a range of days, compute one day, or compute one tile.

``stream`` walks the rows ``start .. stop-1`` of a returns matrix and yields one
:class:`DayResult` per row, for the full pair matrix (N, N) or for a pair list (P,).
Memory is a chunk of days times the pairs (plus, for an EWMA, a few arrays of the pairs'
state), never the history times the pairs.

The pair matrix is cut into tiles of instruments (I x J blocks, :func:`tile`); every path
goes through a tile or a pair list, so a distributed engine can hand tiles to workers and
put the blocks together as :func:`stream` does here.

A ``scale=vol`` measure is computed on :func:`monitor.engine.scaling.standardise` of the
rows up to ``stop``. Each standardised value is a function of its own row and the 250 rows
before it only, and the standardisation always starts at row 0 of the matrix it is given, so
a day's value is the same from every entry point (a full pass, a later ``start``, a
``one_day`` on a trailing prefix): nothing depends on where the computation started.

Backfill from ``start``: rolling and rank windows reach back before ``start`` as needed; an
EWMA starts from its closed form on the history before ``start`` (see
:mod:`monitor.engine.ewma`), so results from ``start`` equal a full pass's results.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import numpy.typing as npt

from monitor._typing import Returns2D
from monitor.engine.bands import DEFAULT_LEVEL, check_level, fisher_band
from monitor.engine.ewma import ewma_tile
from monitor.engine.layout import BoolArray, FloatArray, Layout, PairLayout, TileLayout
from monitor.engine.rolling import window_tile
from monitor.engine.scaling import standardise
from monitor.engine.spec import Measure, as_measure
from monitor.errors import EngineInputError

RETURN_LIMIT = 1e6
"""Returns beyond +-this are clipped to it before any sum (a move of 100,000,000 % is a
data error, not a market move); the running sums of squares and cross products then stay
far from overflow whatever the input."""

DEFAULT_TILE = 2048
"""Instruments per tile side when ``stream`` cuts the matrix (one tile below this)."""


@dataclass(frozen=True, eq=False)
class DayResult:
    """One day of one measure for every computed pair.

    All arrays have the same shape: (N, N) for a matrix, (I, J) for a tile, (P,) for a
    pair list. They are read-only and may be views into a chunk the engine computed.

    Attributes
    ----------
    t : int
        Row index into the returns matrix.
    value : float array
        Correlation in [-1, 1]; NaN below the measure's minimum count or where a side
        has zero variance (see ``stale``).
    n : float array
        Common returns in the window, or the Kish effective count for an EWMA.
    stale : bool array
        True where the count suffices but one side did not move (zero variance).
    level : float
        Confidence level of :attr:`low` / :attr:`high`.
    measure : Measure or None
        Set for a ``beta`` / ``r2`` measure (``value`` is then the slope or R squared).
    r : float array or None
        The correlation a ``beta`` / ``r2`` value comes from.
    ratio : float array or None
        ``sd(B) / sd(A)`` over the same window (``beta`` / ``r2``).
    """

    t: int
    value: FloatArray
    n: FloatArray
    stale: BoolArray
    level: float = DEFAULT_LEVEL
    measure: Measure | None = None
    r: FloatArray | None = None
    ratio: FloatArray | None = None

    @cached_property
    def band(self) -> tuple[FloatArray, FloatArray]:
        """Fisher z band ``(low, high)`` at :attr:`level`; NaN where ``n <= 3``.

        Computed on first use: a backfill that does not read it does not pay for it. A
        ``beta`` / ``r2`` value has the band of :func:`monitor.engine.regression.regression_band`.
        """
        if self.measure is not None and self.r is not None and self.ratio is not None:
            from monitor.engine.regression import regression_band

            low, high = regression_band(self.measure, self.value, self.r, self.ratio,
                                        self.n, self.level)
        else:
            low, high = fisher_band(self.value, self.n, self.level)
        low.flags.writeable = False
        high.flags.writeable = False
        return low, high

    @property
    def low(self) -> FloatArray:
        """Lower end of the band, same shape as :attr:`value`."""
        return self.band[0]

    @property
    def high(self) -> FloatArray:
        """Upper end of the band, same shape as :attr:`value`."""
        return self.band[1]


def as_returns(returns: npt.ArrayLike) -> Returns2D:
    """The returns matrix as float64 (T, N), clipped to +-RETURN_LIMIT; raises on another
    shape or on inf.

    The matrix is produced by :mod:`monitor.data.returns`; a wrong one is a programming error,
    not user input.
    """
    matrix = np.asarray(returns, dtype=np.float64)
    if matrix.ndim != 2:
        raise EngineInputError(f"returns must be a (T, N) matrix, got shape {matrix.shape}")
    if np.isinf(matrix).any():
        raise EngineInputError("returns contain inf; missing returns must be NaN")
    huge = np.abs(matrix) > RETURN_LIMIT  # NaN compares False
    if huge.any():
        matrix = np.where(huge, np.copysign(RETURN_LIMIT, matrix), matrix)
    return matrix


def _day_range(rows: int, start: int, stop: int | None) -> tuple[int, int]:
    stop = rows if stop is None else stop
    if not 0 <= start <= stop <= rows:
        raise EngineInputError(f"need 0 <= start <= stop <= {rows}, got start={start} stop={stop}")
    return start, stop


def _check_index(index: npt.NDArray[np.intp], columns: int, name: str) -> None:
    if index.size and (index.min() < 0 or index.max() >= columns):
        raise EngineInputError(f"{name} must be instrument columns in 0..{columns - 1}")


def _measured_returns(returns: Returns2D, measure: Measure, stop: int) -> Returns2D:
    """What the kernels read: the returns, or for ``scale=vol`` rows 0 .. stop-1 of them
    standardised (rows after ``stop`` are never read, so they are not standardised)."""
    return standardise(returns[:stop]) if measure.scale == "vol" else returns


def _arrays(
    returns: Returns2D,
    measure: Measure,
    layout: Layout,
    start: int,
    stop: int,
    chunk: int | None,
) -> Iterator[tuple[FloatArray, FloatArray, BoolArray]]:
    if 0 in layout.shape:
        return _empty_days(layout.shape, stop - start)
    if measure.kind == "ewma":
        return ewma_tile(returns, measure, layout, start, stop)
    return window_tile(returns, measure, layout, start, stop, chunk)


def _empty_days(
    shape: tuple[int, ...], days: int
) -> Iterator[tuple[FloatArray, FloatArray, BoolArray]]:
    """Days of a layout without pairs (an empty pair list or tile)."""
    for _ in range(days):
        yield np.empty(shape), np.empty(shape), np.empty(shape, dtype=bool)


def _results(
    arrays: Iterator[tuple[FloatArray, FloatArray, BoolArray]], start: int, level: float
) -> Iterator[DayResult]:
    for t, (value, n, stale) in enumerate(arrays, start):
        for array in (value, n, stale):
            if array.flags.writeable:
                array.flags.writeable = False
        yield DayResult(t, value, n, stale, level)


def tile(
    returns: npt.ArrayLike,
    measure: Measure | str,
    rows: npt.ArrayLike,
    cols: npt.ArrayLike,
    *,
    start: int = 0,
    stop: int | None = None,
    level: float = DEFAULT_LEVEL,
    chunk: int | None = None,
) -> Iterator[DayResult]:
    """Stream one block of the pair matrix: instruments ``rows`` against ``cols``.

    Parameters
    ----------
    returns : (T, N) float array, NaN = missing
    measure : Measure or spec text
    rows : (I,) int array
    cols : (J,) int array
    start, stop : int
        Rows to yield, ``0 <= start <= stop <= T`` (``stop`` None: T).
    level : float
        Confidence level of the bands.
    chunk : int or None
        Days computed together (default: sized so a chunk stays near 48 MB).

    Yields
    ------
    DayResult with (I, J) arrays; entry (a, b) is the pair (rows[a], cols[b]).
    """
    matrix = as_returns(returns)
    spec = as_measure(measure)
    layout = TileLayout.of(rows, cols)
    _check_index(layout.rows, matrix.shape[1], "rows")
    _check_index(layout.cols, matrix.shape[1], "cols")
    start, stop = _day_range(matrix.shape[0], start, stop)
    matrix = _measured_returns(matrix, spec, stop)
    return _results(_arrays(matrix, spec, layout, start, stop, chunk), start, check_level(level))


def _matrix_arrays(
    returns: Returns2D,
    measure: Measure,
    start: int,
    stop: int,
    chunk: int | None,
    tile_size: int,
) -> Iterator[tuple[FloatArray, FloatArray, BoolArray]]:
    """Full (N, N) arrays per day, put together from the upper-triangle tiles."""
    size = returns.shape[1]
    edges = list(range(0, size, tile_size)) + [size]
    spans = [slice(lo, hi) for lo, hi in zip(edges[:-1], edges[1:], strict=True)]
    if len(spans) <= 1:
        everything = np.arange(size)
        yield from _arrays(returns, measure, TileLayout(everything, everything), start, stop, chunk)
        return
    parts = []
    for i, rows in enumerate(spans):
        for cols in spans[i:]:
            layout = TileLayout(np.arange(rows.start, rows.stop), np.arange(cols.start, cols.stop))
            if rows == cols:
                layout = TileLayout(layout.rows, layout.rows)
            parts.append((rows, cols, _arrays(returns, measure, layout, start, stop, chunk)))
    for _ in range(start, stop):
        value = np.empty((size, size))
        n = np.empty((size, size))
        stale = np.empty((size, size), dtype=bool)
        for rows, cols, arrays in parts:
            block_value, block_n, block_stale = next(arrays)
            value[rows, cols], n[rows, cols], stale[rows, cols] = block_value, block_n, block_stale
            if rows != cols:
                value[cols, rows] = block_value.T
                n[cols, rows] = block_n.T
                stale[cols, rows] = block_stale.T
        yield value, n, stale


def stream(
    returns: npt.ArrayLike,
    measure: Measure | str,
    *,
    pairs: npt.ArrayLike | None = None,
    start: int = 0,
    stop: int | None = None,
    level: float = DEFAULT_LEVEL,
    chunk: int | None = None,
    tile_size: int | None = None,
) -> Iterator[DayResult]:
    """Yield one :class:`DayResult` per row ``start .. stop-1``.

    Parameters
    ----------
    returns : (T, N) float array
        Returns, NaN = missing. Each pair uses the rows where both have a return.
    measure : Measure or spec text (``rolling:63``, ``rank:63``, ``ewma:hl=21``, ...)
    pairs : (P, 2) int array or None
        Compute only these pairs (arrays (P,)); None: the full (N, N) matrix.
    start, stop : int
        Rows to yield (``stop`` None: T). Earlier rows still serve as warm-up.
    level : float
        Confidence level of the bands, in (0, 1).
    chunk : int or None
        Days computed together for rolling and rank measures.
    tile_size : int or None
        Instruments per tile side for the matrix (default :data:`DEFAULT_TILE`).

    Yields
    ------
    DayResult
    """
    matrix = as_returns(returns)
    spec = as_measure(measure)
    if spec.output != "r":
        raise EngineInputError(
            f"measure {spec.text}: beta and r2 measures are computed on each pair's own "
            "dates; use monitor.engine.stream_on_pair_dates")
    start, stop = _day_range(matrix.shape[0], start, stop)
    level = check_level(level)
    matrix = _measured_returns(matrix, spec, stop)
    if pairs is not None:
        layout = PairLayout.of(pairs)
        _check_index(layout.left_index, matrix.shape[1], "pairs")
        _check_index(layout.right_index, matrix.shape[1], "pairs")
        return _results(_arrays(matrix, spec, layout, start, stop, chunk), start, level)
    size = DEFAULT_TILE if tile_size is None else int(tile_size)
    if size < 1:
        raise EngineInputError(f"tile_size must be >= 1, got {tile_size}")
    return _results(_matrix_arrays(matrix, spec, start, stop, chunk, size), start, level)


def one_day(
    returns: npt.ArrayLike,
    measure: Measure | str,
    t: int = -1,
    *,
    pairs: npt.ArrayLike | None = None,
    level: float = DEFAULT_LEVEL,
) -> DayResult:
    """Compute row ``t`` from the rows up to ``t`` only (the daily run).

    Parameters
    ----------
    returns : (T, N) float array
    measure : Measure or spec text
    t : int
        Row; negative counts from the end (-1: the last row).
    pairs : (P, 2) int array or None
    level : float

    Returns
    -------
    DayResult
        Equal to the day ``t`` of a full :func:`stream`.
    """
    matrix = as_returns(returns)
    rows = matrix.shape[0]
    day = t + rows if t < 0 else t
    if not 0 <= day < rows:
        raise EngineInputError(f"day {t} is outside the {rows} rows of returns")
    result = next(stream(matrix[: day + 1], measure, pairs=pairs, start=day, level=level))
    return result
