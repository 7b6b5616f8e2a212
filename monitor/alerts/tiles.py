"""The pair rules of a replay cut into tiles of instruments, each computed on its own.

Pure: numpy arrays and rules in, sparse conditions out. A tile is block I x block J of the
instruments (I = J on the diagonal); :func:`tile_conditions` receives only the returns of
its two blocks, computes the measures and the conditions of every pair rule for its pairs,
and returns, per rule and day, only the targets the alert book touches: those active in the
book at the start (a streak or an open alert) and those that breached on that day or
before. Every other target never enters the book's step (it looks only at active and
breaching targets), so :class:`SparseConditions` rebuilt in the main process gives the book
exactly the events of a replay in one process. ``monitor.pipeline.distributed`` sends
the tiles to Dask workers.

Only rules whose condition for a pair reads that pair alone are cut (:func:`tileable`):
``level``, ``jump``, ``sign`` and ``shift`` without a false-discovery-rate correction (which
ranks the day's pairs together) on pairs. Group averages, stale, CUSUM and hedge rules and
``shift`` with ``fdr`` run in the main process as before.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from monitor.alerts.replay import Plan, day_inputs, make_plan
from monitor.rules import Condition, Rule
from monitor.rules.targets import PairTargets

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]

TILE_KINDS = frozenset({"level", "jump", "sign", "shift"})
"""Rule kinds whose condition for a pair depends on that pair's returns only."""

FIELDS = ("value", "level", "excess", "z", "reference", "low", "high", "n")
"""The float figures of a condition the alert book reads at its rows."""


def tileable(rule: Rule) -> bool:
    """Whether `rule` can be computed tile by tile (see the module notes)."""
    return (rule.kind in TILE_KINDS and isinstance(rule.targets, PairTargets)
            and getattr(rule, "fdr", "none") == "none")


@dataclass(frozen=True)
class TileRule:
    """One rule restricted to the pairs of one tile: the rule with its targets renumbered
    to the tile's columns, and where those targets sit among the rule's own."""

    rule: Rule
    positions: IntArray
    watched: npt.NDArray[np.bool_]


@dataclass(frozen=True)
class Tile:
    """The work of one tile: instrument columns of blocks I and J and its rules."""

    rows: IntArray
    cols: IntArray
    rules: tuple[TileRule, ...]

    @property
    def columns(self) -> IntArray:
        """The instruments the tile reads, sorted (I then J, without repeats)."""
        return np.union1d(self.rows, self.cols)


@dataclass(frozen=True)
class TileResult:
    """Per rule, the sparse conditions of one tile: ``offsets[d] .. offsets[d+1]`` are the
    entries of day ``from_t + d``; ``index`` their target positions in the rule."""

    rule: str
    offsets: IntArray
    index: IntArray
    breach: npt.NDArray[np.bool_]
    clear: npt.NDArray[np.bool_]
    known: npt.NDArray[np.bool_]
    figures: dict[str, FloatArray]


def cut(rules: Sequence[Rule], n_symbols: int, tile_size: int,
        active: dict[str, IntArray]) -> list[Tile]:
    """The tiles of the tileable `rules` (blocks of `tile_size` instruments, upper triangle
    of blocks); `active` gives each rule's targets active in the alert book."""
    blocks = list(range(0, n_symbols, tile_size))
    tiles = []
    for a, start_a in enumerate(blocks):
        for start_b in blocks[a:]:
            rows = np.arange(start_a, min(start_a + tile_size, n_symbols), dtype=np.int64)
            cols = np.arange(start_b, min(start_b + tile_size, n_symbols), dtype=np.int64)
            columns = np.union1d(rows, cols)
            tile_rules = []
            for rule in rules:
                targets = rule.targets
                assert isinstance(targets, PairTargets)
                low, high = targets.pairs[:, 0], targets.pairs[:, 1]
                inside = ((low // tile_size == start_a // tile_size)
                          & (high // tile_size == start_b // tile_size))
                positions = np.flatnonzero(inside).astype(np.int64)
                if positions.size == 0:
                    continue
                local = np.searchsorted(columns, targets.pairs[positions])
                labels = [targets.labels[k] for k in positions.tolist()]
                sub = dataclasses.replace(
                    rule, targets=PairTargets(labels=labels, pairs=local.astype(np.int64)))
                watched = np.isin(positions, active.get(rule.name, np.empty(0, np.int64)))
                tile_rules.append(TileRule(sub, positions, watched))
            if tile_rules:
                tiles.append(Tile(rows, cols, tuple(tile_rules)))
    return tiles


def tile_conditions(
    block_a: np.ndarray,
    block_b: np.ndarray,
    tile: Tile,
    dates: Sequence[dt.date],
    *,
    from_t: int,
    stop_t: int,
    level: float,
) -> list[TileResult]:
    """The sparse conditions of `tile` on rows ``from_t .. stop_t-1``.

    `block_a` and `block_b` are the returns (T, |I|) and (T, |J|) of the tile's two blocks
    (the same array on the diagonal).
    """
    columns = tile.columns
    returns = np.empty((block_a.shape[0], columns.size))
    returns[:, np.searchsorted(columns, tile.rows)] = block_a
    returns[:, np.searchsorted(columns, tile.cols)] = block_b
    plan: Plan = make_plan([r.rule for r in tile.rules], [str(c) for c in columns.tolist()],
                           level=level)
    seen = [r.watched.copy() for r in tile.rules]
    parts: list[list[tuple[IntArray, Condition]]] = [[] for _ in tile.rules]
    for _, inputs in day_inputs(returns, dates, plan, from_t=from_t, stop_t=stop_t):
        assert inputs is not None
        for k, tile_rule in enumerate(tile.rules):
            condition = tile_rule.rule.evaluate(inputs)
            seen[k] |= condition.breach
            parts[k].append((np.flatnonzero(seen[k]), condition))
    results = []
    for tile_rule, days in zip(tile.rules, parts, strict=True):
        sizes = [index.size for index, _ in days]
        offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        local = np.concatenate([index for index, _ in days]) if days else np.empty(0, np.int64)

        def gather(name: str, days: list[tuple[IntArray, Condition]] = days) -> np.ndarray:
            if not days:
                return np.empty(0)
            return np.concatenate([np.asarray(getattr(c, name))[i] for i, c in days])

        results.append(TileResult(
            rule=tile_rule.rule.name, offsets=offsets,
            index=tile_rule.positions[local.astype(np.int64)],
            breach=gather("breach").astype(bool), clear=gather("clear").astype(bool),
            known=gather("known").astype(bool),
            figures={name: gather(name).astype(np.float64) for name in FIELDS},
        ))
    return results


@dataclass
class _Band:
    """A condition's source rebuilt from the tiles: the value, band, count and stale mask
    the tiles sent (what :class:`Condition` reads for ``low``, ``high`` and ``n``)."""

    value: FloatArray
    low: FloatArray
    high: FloatArray
    n: FloatArray
    stale: npt.NDArray[np.bool_]


class SparseConditions:
    """The conditions of the tiled rules, put together from the tiles' results, day by day.

    Targets absent from every tile on a day get breach, clear and known False and NaN
    figures: the book never looks at them (they are neither active nor breaching).
    """

    def __init__(self, plan: Plan, from_t: int) -> None:
        self._from_t = from_t
        self._parts: dict[str, list[TileResult]] = {}
        self._sizes = {rule.name: len(rule.targets) for rule in plan.rules}

    def add(self, results: Sequence[TileResult]) -> None:
        for result in results:
            self._parts.setdefault(result.rule, []).append(result)

    def __call__(self, rule: Rule, t: int) -> Condition:
        size = self._sizes[rule.name]
        d = t - self._from_t
        breach = np.zeros(size, dtype=bool)
        clear = np.zeros(size, dtype=bool)
        known = np.zeros(size, dtype=bool)
        figures = {name: np.full(size, np.nan) for name in FIELDS}
        for part in self._parts.get(rule.name, ()):
            a, b = int(part.offsets[d]), int(part.offsets[d + 1])
            index = part.index[a:b]
            breach[index] = part.breach[a:b]
            clear[index] = part.clear[a:b]
            known[index] = part.known[a:b]
            for name in FIELDS:
                figures[name][index] = part.figures[name][a:b]
        return Condition(
            breach=breach, clear=clear, known=known, value=figures["value"],
            level=figures["level"], excess=figures["excess"], z=figures["z"],
            reference=figures["reference"],
            source=_Band(figures["value"], figures["low"], figures["high"], figures["n"],
                         np.zeros(size, dtype=bool)),
        )
