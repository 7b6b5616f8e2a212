"""Every pair on its own dates: the dates on which both of its instruments have a return.

A returns matrix (T, N) holds the union of every instrument's dates, so a row may be a day
on which only some markets traded. A pair's trailing window of ``W`` is ``W`` of *its own*
dates (rows where both sides have a return), never ``W`` rows of the union, so a pair's
value does not depend on which other instruments share the matrix: ``comove series`` on the
pair's two columns, the rules on the desk's whole panel, the digest and the pages all see
the same number every day.

How: instruments are grouped by the rows on which they have a return (one group per
calendar on a real desk); the pairs of two groups share one set of rows. For each such set
the rows are cut out of the matrix and handed to the engine (:func:`monitor.engine.stream`,
matrix path when the set's pairs are dense), and the results are laid back on the union's
rows. On a row where a pair has no return on one side, the pair keeps the value of its
last own date (the window did not move); before its first value it is NaN with ``n = 0``.

Stale (a side that did not move): decided on the window's own values, exactly (all its
returns in the window equal, :func:`constant_sides`; for an EWMA all its returns so far),
not from the engine's running sums, whose rounding cannot tell a tiny variance far from
the history's mean from zero. Where the sums called a moving side flat, the value comes
from :func:`window_value`, a direct two-pass computation on the window.

``scale=vol`` measures and the statistical rules read returns standardised by each
instrument's own history (:func:`own_standardise`: the volatility recursion runs over the
instrument's own returns, skipping the rows it has none), so they too are the same in any
panel.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor._typing import Returns2D
from monitor.engine.bands import DEFAULT_LEVEL, check_level
from monitor.engine.layout import BoolArray, FloatArray, IntArray, sorted_unique
from monitor.engine.rank import average_ranks
from monitor.engine.regression import regression_values, side_variances
from monitor.engine.scaling import standardise
from monitor.engine.spec import Measure, as_measure
from monitor.engine.stream import DayResult, as_returns, stream
from monitor.errors import EngineInputError

MATRIX_SHARE = 10
"""A set of rows whose pairs are at least 1/10 of its instruments' pairs runs the engine's
(N, N) matrix path (as :attr:`monitor.alerts.replay.Plan.use_matrix` decides)."""


def presence_groups(returns: Returns2D) -> IntArray:
    """Group id (N,) of each instrument: equal ids have a return on exactly the same rows."""
    present = ~np.isnan(np.asarray(returns, dtype=np.float64))
    if present.shape[1] == 0:
        return np.zeros(0, dtype=np.int64)
    packed = np.packbits(present, axis=0).T
    _, inverse = np.unique(packed, axis=0, return_inverse=True)
    return np.asarray(inverse, dtype=np.int64).reshape(-1)


@dataclass(frozen=True)
class PairSet:
    """Pairs whose two sides have returns on the same rows.

    Attributes
    ----------
    members : int array (M,)
        Positions of these pairs in the caller's pair list.
    rows : int array (R,)
        Rows of the matrix where every member pair has both returns, ascending.
    columns : int array (C,)
        Instrument columns the members use.
    local : int array (M, 2)
        The member pairs as positions into ``columns``.
    """

    members: IntArray
    rows: IntArray
    columns: IntArray
    local: IntArray

    @property
    def dense(self) -> bool:
        size = len(self.columns)
        return size > 2 and len(self.members) * MATRIX_SHARE >= size * (size - 1) // 2


def pair_sets(returns: Returns2D, pairs: IntArray) -> list[PairSet]:
    """The pairs (P, 2) split by the rows their two sides share (see :class:`PairSet`)."""
    values = np.asarray(returns, dtype=np.float64)
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    if not len(pairs):
        return []
    group = presence_groups(values)
    a, b = group[pairs[:, 0]], group[pairs[:, 1]]
    key = np.minimum(a, b) * (len(group) + 1) + np.maximum(a, b)
    _, which = np.unique(key, return_inverse=True)
    which = np.asarray(which).reshape(-1)
    present = ~np.isnan(values)
    sets = []
    for k in range(int(which.max()) + 1):
        members = np.flatnonzero(which == k)
        i, j = pairs[members[0]]
        rows = np.flatnonzero(present[:, i] & present[:, j])
        columns = sorted_unique(pairs[members])
        local = np.searchsorted(columns, pairs[members])
        sets.append(PairSet(members, rows, columns, np.asarray(local, dtype=np.int64)))
    return sets


def own_standardise(returns: Returns2D) -> Returns2D:
    """:func:`monitor.engine.scaling.standardise` of each instrument on its own rows.

    The volatility recursion of an instrument steps over its own returns only (rows where
    it has none are skipped, not counted as days), so a value depends on the instrument's
    history alone, never on the other columns of the matrix.
    """
    values = as_returns(returns)
    out = np.full(values.shape, np.nan)
    group = presence_groups(values)
    present = ~np.isnan(values)
    for k in np.unique(group):
        columns = np.flatnonzero(group == k)
        rows = np.flatnonzero(present[:, columns[0]])
        if rows.size:
            out[np.ix_(rows, columns)] = standardise(values[np.ix_(rows, columns)])
    return out


def _plain(measure: Measure) -> Measure:
    """The measure without ``scale=vol`` (the caller standardised already)."""
    return dataclasses.replace(measure, scale="none") if measure.scale == "vol" else measure


def constant_sides(block: Returns2D, measure: Measure) -> BoolArray:
    """(R, C): where each column's valid values in the measure's window ending on each row
    are all equal (largest == smallest), an exact test on the window's own values. For an
    EWMA the window is every row so far (its weights never reach zero). False before a
    column's first valid value; a zero-mean EWMA is constant only on exact zeros."""
    values = np.asarray(block, dtype=np.float64)
    if not measure.centred:  # a zero-mean EWMA: only a side of exact zeros has no scale
        values = np.where(np.isnan(values), np.nan, values != 0.0)
        return np.fmax.accumulate(values, axis=0) == 0.0
    if measure.kind == "ewma" or measure.window is None:
        high = np.fmax.accumulate(values, axis=0)
        low = np.fmin.accumulate(values, axis=0)
        return high == low
    window = int(measure.window)
    if values.shape[0] == 0:
        return np.zeros(values.shape, dtype=bool)
    padded = np.vstack([np.full((window - 1, values.shape[1]), np.nan), values])
    high = _sliding_reduce(np.fmax, padded, window)
    low = _sliding_reduce(np.fmin, padded, window)
    return high == low


def _sliding_reduce(reduce: np.ufunc, block: Returns2D, window: int) -> Returns2D:
    """``reduce`` over every run of ``window`` rows (doubling: log2(W) passes)."""
    acc = block
    span = 1
    while 2 * span <= window:
        acc = reduce(acc[:-span], acc[span:])
        span *= 2
    rest = window - span
    return reduce(acc[: acc.shape[0] - rest], acc[rest:])


def window_value(x: FloatArray, y: FloatArray, measure: Measure) -> float:
    """The measure's value on the last day of ``x``, ``y`` (the rows so far, last = today)
    by a direct two-pass computation on the window's own values: the slow reference the
    engine's sums are checked against, used where the sums cannot tell a small variance
    from rounding."""
    both = np.isfinite(x) & np.isfinite(y)
    if measure.kind != "ewma":
        window = int(measure.window or len(x))
        keep = both[-window:]
        a, b = x[-window:][keep], y[-window:][keep]
        if measure.kind == "rank":
            a, b = average_ranks(a), average_ranks(b)
        weights = np.ones(len(a))
    else:
        lam = float(measure.lam or 0.0)
        ages = np.cumsum(np.ones(len(x)))[::-1] - 1.0  # 0 for today
        a, b, weights = x[both], y[both], lam ** ages[both]
    if len(a) < max(2, measure.min_count):
        return float("nan")
    total = weights.sum()
    if measure.kind == "ewma" and not measure.centred:
        ma = mb = 0.0
    else:
        ma, mb = float(weights @ a / total), float(weights @ b / total)
    da, db = a - ma, b - mb
    var_a, var_b = float(weights @ (da * da)), float(weights @ (db * db))
    if var_a <= 0.0 or var_b <= 0.0:
        return float("nan")
    return float(np.clip(weights @ (da * db) / np.sqrt(var_a * var_b), -1.0, 1.0))


DIRECT_PAIRS = 8
"""A set of at most this many pairs (scattered gaps give one set per pair) of a rolling or
rank measure is computed directly, all its days at once (two-pass on each window), instead
of through the engine's per-day stream, whose fixed cost per set and day dominates then."""


def _direct(spec: Measure, block: Returns2D, part: PairSet) -> bool:
    if spec.kind not in ("rolling", "rank") or len(part.members) > DIRECT_PAIRS:
        return False
    return spec.kind == "rolling" or not np.isnan(block).any()


def _direct_results(block: Returns2D, spec: Measure, local: IntArray, start: int, stop: int,
                    level: float) -> Iterator[DayResult]:
    """Days ``start .. stop-1`` of a rolling or rank measure for the pairs ``local`` of a
    set's block, by a two-pass computation on every window at once (NaN rows skipped)."""
    from numpy.lib.stride_tricks import sliding_window_view

    window = int(spec.window or 1)
    lo = max(0, start - window + 1)
    rows = block[lo:stop]
    pad = np.full((window - 1 - (start - lo), rows.shape[1]), np.nan)
    padded = np.vstack([pad, rows]) if pad.size else rows
    stack = sliding_window_view(padded, window, axis=0)  # (days, C, W)
    x = stack[:, local[:, 0], :]
    y = stack[:, local[:, 1], :]
    both = np.isfinite(x) & np.isfinite(y)
    if spec.kind == "rank":
        x = average_ranks(np.where(both, x, np.nan))
        y = average_ranks(np.where(both, y, np.nan))
    count = both.sum(axis=2).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        xs = np.where(both, x, 0.0)
        ys = np.where(both, y, 0.0)
        mx = xs.sum(axis=2) / count
        my = ys.sum(axis=2) / count
        dx = np.where(both, x - mx[..., None], 0.0)
        dy = np.where(both, y - my[..., None], 0.0)
        sxy = (dx * dy).sum(axis=2)
        sxx = (dx * dx).sum(axis=2)
        syy = (dy * dy).sum(axis=2)
        value = np.clip(sxy / np.sqrt(sxx * syy), -1.0, 1.0)
    value[(count < spec.min_count) | ~np.isfinite(value)] = np.nan
    no_stale = np.zeros(len(local), dtype=bool)
    for k in range(stop - start):
        yield DayResult(start + k, value[k], count[k], no_stale, level)


class _SetStream:
    """One pair set's engine results, stepped along the union's rows."""

    def __init__(self, data: Returns2D, spec: Measure, part: PairSet, start: int, stop: int,
                 level: float, chunk: int | None, regression: bool = False) -> None:
        self.part = part
        size = len(part.members)
        self.ratio: FloatArray = np.full(size, np.nan)
        self.variances: Returns2D | None = None
        self.value: FloatArray = np.full(size, np.nan)
        self.n: FloatArray = np.zeros(size)
        self.stale: BoolArray = np.zeros(size, dtype=bool)
        # First own row to compute: the last one on or before `start` (its value is the
        # value at `start`); one past the last on or before `stop - 1`.
        self.next = max(int(np.searchsorted(part.rows, start, side="right")) - 1, 0)
        self.stop = int(np.searchsorted(part.rows, stop - 1, side="right"))
        self.results: Iterator[DayResult] | None = None
        self.flat: IntArray | None = None
        self.spec = spec
        self.block: Returns2D = np.empty((0, len(part.columns)))
        self.constant: BoolArray = np.empty((0, len(part.columns)), dtype=bool)
        if self.next < self.stop:
            self.block = data[np.ix_(part.rows[:self.stop], part.columns)]
            self.constant = constant_sides(self.block, spec)
            if regression:
                self.variances = side_variances(self.block, spec)
            size_c = len(part.columns)
            if part.dense:
                self.flat = part.local[:, 0] * size_c + part.local[:, 1]
            if _direct(spec, self.block, part):
                self.flat = None  # the direct path gives per-pair arrays
                self.results = _direct_results(self.block, spec, part.local, self.next,
                                               self.stop, level)
            else:
                self.results = stream(self.block, spec,
                                      pairs=None if part.dense else part.local,
                                      start=self.next, stop=self.stop, level=level,
                                      chunk=chunk)

    def advance(self, t: int) -> None:
        """Take in every own row up to ``t``."""
        rows = self.part.rows
        while self.next < self.stop and rows[self.next] <= t:
            assert self.results is not None
            day = next(self.results)
            if self.flat is None:
                value, n, stale = day.value, day.n, day.stale
            else:
                value = np.take(np.ravel(day.value), self.flat)
                n = np.take(np.ravel(day.n), self.flat)
                stale = np.take(np.ravel(day.stale), self.flat)
            self.value, self.n, self.stale = self._exact_stale(self.next, value, n, stale)
            if self.variances is not None:
                var = self.variances[self.next]
                _, self.ratio = regression_values(
                    self.value, var[self.part.local[:, 0]], var[self.part.local[:, 1]], self.spec)
            self.next += 1

    def _exact_stale(self, k: int, value: FloatArray, n: FloatArray, stale: BoolArray
                     ) -> tuple[FloatArray, FloatArray, BoolArray]:
        """The stale flag from the window's own values (:func:`constant_sides`), not from
        the engine's sums: a pair the sums call flat whose returns do move gets its value
        from :func:`window_value`; one whose side is constant gets NaN."""
        local = self.part.local
        side = self.constant[k]
        with np.errstate(invalid="ignore"):
            enough = n >= self.spec.min_count
        exact = (side[local[:, 0]] | side[local[:, 1]]) & enough
        if np.array_equal(exact, stale):
            return value, n, stale
        value = np.array(value)
        value[exact] = np.nan
        for p in np.flatnonzero(stale & ~exact):
            value[p] = window_value(self.block[:k + 1, local[p, 0]],
                                    self.block[:k + 1, local[p, 1]], self.spec)
        return value, n, exact


def stream_on_pair_dates(
    returns: npt.ArrayLike,
    measure: Measure | str,
    pairs: npt.ArrayLike,
    *,
    start: int = 0,
    stop: int | None = None,
    level: float = DEFAULT_LEVEL,
    chunk: int | None = None,
) -> Iterator[DayResult]:
    """Yield one :class:`DayResult` (P,) per row ``start .. stop-1``, each pair on its own dates.

    Parameters
    ----------
    returns : (T, N) float array, NaN = no return.
    measure : Measure or spec text
    pairs : (P, 2) int array of instrument columns
    start, stop : int
        Rows to yield (``stop`` None: T); the windows reach back before ``start``.
    level : float
        Confidence level of the bands.
    chunk : int or None
        Passed to the engine.

    Yields
    ------
    DayResult whose arrays follow ``pairs``; a pair without a return on row ``t`` keeps
    the value of its last own date.
    """
    matrix = as_returns(returns)
    spec = as_measure(measure)
    stop = matrix.shape[0] if stop is None else stop
    if not 0 <= start <= stop <= matrix.shape[0]:
        raise EngineInputError(
            f"need 0 <= start <= stop <= {matrix.shape[0]}, got start={start} stop={stop}")
    index = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    if index.size and (index.min() < 0 or index.max() >= matrix.shape[1]):
        raise EngineInputError(f"pairs must be instrument columns in 0..{matrix.shape[1] - 1}")
    level = check_level(level)
    return _walk(matrix[:stop], spec, index, start, stop, level, chunk)


def _walk(matrix: Returns2D, spec: Measure, index: IntArray, start: int, stop: int,
          level: float, chunk: int | None) -> Iterator[DayResult]:
    data = own_standardise(matrix) if spec.scale == "vol" else matrix
    plain = _plain(spec.correlation)
    regression = spec.output != "r"
    # r2 needs r only; beta also each side's variance (sd(B) / sd(A))
    parts = [_SetStream(data, plain, part, start, stop, level, chunk, spec.output == "beta")
             for part in pair_sets(matrix, index)]
    size = len(index)
    for t in range(start, stop):
        value = np.full(size, np.nan)
        n = np.zeros(size)
        stale = np.zeros(size, dtype=bool)
        ratio = np.full(size, np.nan)
        for part in parts:
            part.advance(t)
            members = part.part.members
            value[members], n[members], stale[members] = part.value, part.n, part.stale
            if regression:
                ratio[members] = part.ratio
        if not regression:
            for array in (value, n, stale):
                array.flags.writeable = False
            yield DayResult(t, value, n, stale, level)
            continue
        r = value
        value, ratio = regression_values(r, np.ones(size), ratio * ratio, spec)
        for array in (value, n, stale, r, ratio):
            array.flags.writeable = False
        yield DayResult(t, value, n, stale, level, measure=spec, r=r, ratio=ratio)


class OwnHistory:
    """Standardised returns of the trailing rows, each instrument or pair on its own dates.

    Built once per replay from the whole matrix (every value is a function of its trailing
    own rows, so each start row sees the same numbers).
    """

    def __init__(self, returns: Returns2D) -> None:
        values = as_returns(returns)
        self.scaled = own_standardise(values)
        self.present = ~np.isnan(values)
        self.group = presence_groups(values)
        self._own: list[tuple[IntArray, IntArray, FloatArray]] = []
        for k in np.unique(self.group):
            columns = np.flatnonzero(self.group == k)
            rows = np.flatnonzero(self.present[:, columns[0]])
            self._own.append((rows, columns, self.scaled[np.ix_(rows, columns)]))
        self._pairs: dict[tuple[int, int], tuple[IntArray, IntArray, FloatArray]] = {}

    def instruments(self, t: int, rows: int) -> FloatArray:
        """(rows, N): each column the instrument's last ``rows`` own values up to row ``t``
        (last row = its latest), NaN above its first."""
        out = np.full((rows, self.scaled.shape[1]), np.nan)
        for own_rows, columns, block in self._own:
            end = int(np.searchsorted(own_rows, t, side="right"))
            part = block[max(0, end - rows):end]
            if len(part):
                out[rows - len(part):, columns] = part
        return out

    def pairs(self, t: int, rows: int, pairs: IntArray) -> tuple[FloatArray, FloatArray]:
        """(rows, M) twice: each pair's last ``rows`` common dates up to row ``t``, both
        sides standardised on their own histories; NaN above the pair's first date."""
        index = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
        x = np.full((rows, len(index)), np.nan)
        y = np.full((rows, len(index)), np.nan)
        a, b = self.group[index[:, 0]], self.group[index[:, 1]]
        a, b = np.minimum(a, b), np.maximum(a, b)
        key = a * (len(self.group) + 1) + b
        for value in np.unique(key):
            members = np.flatnonzero(key == value)
            ga, gb = int(a[members[0]]), int(b[members[0]])
            if (ga, gb) not in self._pairs:
                i, j = index[members[0]]
                common = np.flatnonzero(self.present[:, i] & self.present[:, j])
                columns = np.flatnonzero((self.group == ga) | (self.group == gb))
                self._pairs[(ga, gb)] = (common, columns, self.scaled[np.ix_(common, columns)])
            common, columns, block = self._pairs[(ga, gb)]
            end = int(np.searchsorted(common, t, side="right"))
            part = block[max(0, end - rows):end]
            if len(part):
                left = np.searchsorted(columns, index[members, 0])
                right = np.searchsorted(columns, index[members, 1])
                x[rows - len(part):, members] = part[:, left]
                y[rows - len(part):, members] = part[:, right]
        return x, y


def matrix_on_pair_dates(
    returns: npt.ArrayLike,
    measure: Measure | str,
    *,
    start: int = 0,
    stop: int | None = None,
    level: float = DEFAULT_LEVEL,
) -> Iterator[DayResult]:
    """:func:`stream_on_pair_dates` of every pair ``i < j``, laid out as (N, N) arrays
    (symmetric; the diagonal is NaN with ``n = 0``), for group averages and matrices."""
    matrix = as_returns(returns)
    size = matrix.shape[1]
    first, second = np.triu_indices(size, k=1)
    index = np.column_stack([first, second]).astype(np.int64)
    for day in stream_on_pair_dates(matrix, measure, index, start=start, stop=stop,
                                    level=level):
        value = np.full((size, size), np.nan)
        n = np.zeros((size, size))
        stale = np.zeros((size, size), dtype=bool)
        value[first, second] = value[second, first] = day.value
        n[first, second] = n[second, first] = day.n
        stale[first, second] = stale[second, first] = day.stale
        for array in (value, n, stale):
            array.flags.writeable = False
        yield DayResult(day.t, value, n, stale, day.level)
