"""What a rule watches: pairs, groups or single instruments, resolved to column indices.

A rule's targets are fixed when the configuration is read. Pairs are resolved to an int
array (P, 2) of column indices into the desk's ``symbols`` with ``i < j`` (canonical order),
sorted, de-duplicated and labelled ``"A/B"`` in that order. :class:`PairLayout` maps those
pairs onto the pair list the pipeline computed the measures for, so a rule can pick its
pairs out of one day's arrays with a single ``np.take``.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import overload

import numpy as np
import numpy.typing as npt

from monitor.engine.layout import sorted_unique
from monitor.errors import ConfigError
from monitor.rules.params import TableReader, suggestion

IntArray = npt.NDArray[np.int64]
BoolArray = npt.NDArray[np.bool_]


def split_pair(text: str, symbols: Iterable[str] | Mapping[str, object]
               ) -> list[tuple[str, str]]:
    """The ways `text` ("A/B") reads as two known symbols, trying every '/' in it (a
    symbol may itself hold '/', as "EUR/USD" in "EUR/USD/KLV"). Blanks around each side
    are dropped. One answer: the pair; none: not a pair of these symbols; several:
    ambiguous (the caller says so)."""
    known = symbols if isinstance(symbols, Mapping) else set(symbols)
    found = []
    for cut, char in enumerate(text):
        if char != "/":
            continue
        a, b = text[:cut].strip(), text[cut + 1:].strip()
        if a and b and a in known and b in known:
            found.append((a, b))
    return found


def pair_symbols(label: str, symbols: Mapping[str, object]) -> tuple[str, str] | None:
    """The two symbols of a pair target's label, or None for a single instrument's or a
    group's target. A label that is itself a symbol is an instrument ("EUR/USD"); else the
    first reading of `split_pair`, else the text either side of its first '/'."""
    if label in symbols:
        return None
    readings = split_pair(label, symbols)
    if readings:
        return readings[0]
    a, slash, b = label.partition("/")
    return (a, b) if slash else None


@dataclass(frozen=True)
class Universe:
    """The desk's instruments and named groups, as the config loader hands them over."""

    symbols: tuple[str, ...]
    groups: Mapping[str, tuple[str, ...]]
    index: Mapping[str, int]

    @classmethod
    def build(cls, symbols: Sequence[str], groups: Mapping[str, Sequence[str]]) -> Universe:
        """Check and index the universe.

        Raises
        ------
        ConfigError
            A symbol is listed twice or a group names an unknown symbol.
        """
        index: dict[str, int] = {}
        for position, symbol in enumerate(symbols):
            if symbol in index:
                raise ConfigError(f"symbols: {symbol!r} is listed twice")
            index[symbol] = position
        checked: dict[str, tuple[str, ...]] = {}
        for name, members in groups.items():
            for member in members:
                if member not in index:
                    hint = suggestion(member, index)
                    raise ConfigError(f"groups.{name}: unknown symbol {member!r}{hint}")
            checked[name] = tuple(dict.fromkeys(members))
        return cls(symbols=tuple(symbols), groups=checked, index=index)

    def symbol_index(self, reader: TableReader, key: str, symbol: str, context: str = "") -> int:
        """Column index of ``symbol``, or a ConfigError naming the rule and key."""
        if symbol not in self.index:
            where = f" in {context!r}" if context else ""
            hint = suggestion(symbol, self.index)
            raise reader.error(key, f"unknown symbol {symbol!r}{where}{hint}")
        return self.index[symbol]

    def group_indices(self, reader: TableReader, key: str, group: str) -> IntArray:
        """Sorted column indices of a group's members, or a ConfigError."""
        if group not in self.groups:
            hint = suggestion(group, self.groups)
            raise reader.error(key, f"unknown group {group!r}{hint}")
        return np.sort(np.array([self.index[s] for s in self.groups[group]], dtype=np.int64))


@dataclass(frozen=True, eq=False, kw_only=True)
class Targets:
    """Base of the three target families; ``labels`` has one entry per target (P_rule,).

    Attributes
    ----------
    labels : sequence of str
        ``"A/B"`` for pairs (a lazy :class:`PairLabels`), the symbol for instruments, the
        group name for group averages.
    """

    labels: Sequence[str]
    _positions: dict[str, int] = field(default_factory=dict, init=False, repr=False)

    def __len__(self) -> int:
        return len(self.labels)

    def position(self, label: str) -> int | None:
        """Index of a target label, or None when the rule does not watch it."""
        if isinstance(self.labels, PairLabels):
            return self.labels.position(label)
        if not self._positions:
            self._positions.update((name, k) for k, name in enumerate(self.labels))
        return self._positions.get(label)

    def mask(self, labels: Iterable[str]) -> BoolArray:
        """Boolean mask (P_rule,) that is True at the given labels (unknown labels ignored).

        The pipeline builds the acknowledged and muted masks with it.
        """
        out = np.zeros(len(self.labels), dtype=bool)
        for label in labels:
            position = self.position(label)
            if position is not None:
                out[position] = True
        return out

    def symbols_of(self, k: int) -> tuple[int, ...]:
        """Column indices of the instruments target ``k`` concerns."""
        raise NotImplementedError

    def symbols_for(self, indices: IntArray) -> list[tuple[int, ...]]:
        """``symbols_of`` for many targets (M,) at once."""
        return [self.symbols_of(k) for k in indices.tolist()]


@dataclass(frozen=True, eq=False, kw_only=True)
class PairTargets(Targets):
    """Pairs (P, 2) of column indices, ``i < j``, sorted, with labels ``"A/B"``.

    ``between`` keeps the two group names of a ``between`` key, so the digest and the
    pages can show the matrix across the two groups (empty for other targets).
    """

    pairs: IntArray
    between: tuple[str, str] | None = None

    def symbols_of(self, k: int) -> tuple[int, ...]:
        return (int(self.pairs[k, 0]), int(self.pairs[k, 1]))

    def symbols_for(self, indices: IntArray) -> list[tuple[int, ...]]:
        return [(i, j) for i, j in self.pairs[indices].tolist()]


@dataclass(frozen=True, eq=False, kw_only=True)
class SymbolTargets(Targets):
    """Single instruments (P,) as column indices, sorted."""

    symbols: IntArray

    def symbols_of(self, k: int) -> tuple[int, ...]:
        return (int(self.symbols[k]),)


@dataclass(frozen=True, eq=False, kw_only=True)
class GroupTargets(Targets):
    """Groups (G,) and, concatenated, the pairs inside each one.

    Attributes
    ----------
    members : list of int arrays
        Column indices of each group's instruments.
    pairs : int array (M, 2)
        All pairs within all groups, group after group.
    group_of_pair : int array (M,)
        Which group (0..G-1) each row of ``pairs`` belongs to.
    """

    members: tuple[IntArray, ...]
    pairs: IntArray
    group_of_pair: IntArray

    def symbols_of(self, k: int) -> tuple[int, ...]:
        return tuple(int(i) for i in self.members[k])


def _pairs_within(indices: IntArray) -> IntArray:
    first, second = np.triu_indices(indices.size, k=1)
    return np.column_stack([indices[first], indices[second]]).astype(np.int64)


def _canonical(pairs: IntArray, n_symbols: int) -> IntArray:
    """Sort, de-duplicate and order each pair as (low, high)."""
    low = np.minimum(pairs[:, 0], pairs[:, 1])
    high = np.maximum(pairs[:, 0], pairs[:, 1])
    codes = sorted_unique(low * n_symbols + high)
    return np.column_stack([codes // n_symbols, codes % n_symbols]).astype(np.int64)


class PairLabels(Sequence[str]):
    """The ``"A/B"`` labels of sorted canonical pairs, written only when asked for.

    A rule over every pair of 3,000 instruments has 4.5 million targets; making all their
    strings when the settings are loaded would take seconds and hundreds of megabytes, and
    most commands never read them. Indexing formats one label; ``in`` and ``index`` look the
    two symbols up and binary-search the pair codes.
    """

    def __init__(self, pairs: IntArray, symbols: Sequence[str]) -> None:
        self._pairs = pairs
        self._symbols = tuple(symbols)
        self._n = len(self._symbols)
        self._codes = pairs[:, 0] * self._n + pairs[:, 1]  # increasing: pairs are sorted
        self._index: dict[str, int] | None = None

    def __len__(self) -> int:
        return int(self._pairs.shape[0])

    @overload
    def __getitem__(self, k: int) -> str: ...

    @overload
    def __getitem__(self, k: slice) -> list[str]: ...

    def __getitem__(self, k: int | slice) -> str | list[str]:
        if isinstance(k, slice):
            return [self[i] for i in range(*k.indices(len(self)))]
        i, j = self._pairs[k]
        return f"{self._symbols[i]}/{self._symbols[j]}"

    def __iter__(self) -> Iterator[str]:
        symbols = self._symbols
        for i, j in self._pairs.tolist():
            yield f"{symbols[i]}/{symbols[j]}"

    def position(self, label: object) -> int | None:
        """Index of ``label``, or None when it is not one of these pairs."""
        if not isinstance(label, str):
            return None
        if self._index is None:
            self._index = {symbol: k for k, symbol in enumerate(self._symbols)}
        # A symbol may itself contain '/': try every split point.
        for cut in range(1, len(label) - 1):
            if label[cut] != "/":
                continue
            i = self._index.get(label[:cut])
            j = self._index.get(label[cut + 1:])
            if i is None or j is None or i >= j:
                continue
            code = i * self._n + j
            k = int(np.searchsorted(self._codes, code))
            if k < self._codes.size and self._codes[k] == code:
                return k
        return None

    def __contains__(self, label: object) -> bool:
        return self.position(label) is not None

    def __eq__(self, other: object) -> bool:
        if isinstance(other, PairLabels | tuple | list):
            return len(self) == len(other) and all(a == b for a, b in zip(self, other,
                                                                         strict=True))
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        head = ", ".join(repr(label) for label in self[:3])
        return f"PairLabels({len(self)} pairs: {head}{', ...' if len(self) > 3 else ''})"

    def index(self, label: object, start: int = 0, stop: int | None = None) -> int:
        k = self.position(label)
        if k is None or k < start or (stop is not None and k >= stop):
            raise ValueError(f"{label!r} is not a watched pair")
        return k


def _pair_labels(pairs: IntArray, symbols: Sequence[str]) -> PairLabels:
    return PairLabels(pairs, symbols)


def resolve_pairs(reader: TableReader, universe: Universe) -> PairTargets:
    """Resolve ``pairs``, ``group``, ``between`` and ``all`` into pair targets.

    ``pairs``, ``group`` and ``between`` may be combined (their union is watched);
    ``all = true`` watches every pair and excludes the others.

    Raises
    ------
    ConfigError
        Unknown symbol or group, a malformed pair, ``between`` not naming two groups,
        ``all`` combined with other targets, or no pair at all.
    """
    n = len(universe.symbols)
    chosen = [key for key in ("pairs", "group", "between") if reader.has(key)]
    if reader.read_bool("all"):
        if chosen:
            raise reader.error("all", f"all = true cannot be combined with {chosen[0]}")
        first, second = np.triu_indices(n, k=1)
        pairs = np.column_stack([first, second]).astype(np.int64, copy=False)
        if pairs.shape[0] == 0:
            raise reader.error("all", "the desk has fewer than two instruments, no pairs")
        return PairTargets(labels=_pair_labels(pairs, universe.symbols), pairs=pairs)
    if not chosen:
        raise reader.error("targets", "no targets: set pairs, group, between or all = true")
    blocks: list[IntArray] = []
    for text in reader.read_names("pairs") or []:
        readings = split_pair(text, universe.index)
        if len(readings) > 1:
            choices = " or ".join(f"'{a}' with '{b}'" for a, b in readings)
            raise reader.error("pairs", f"{text!r} is ambiguous: {choices}")
        parts = list(readings[0]) if readings else [part.strip() for part in text.split("/")]
        if len(parts) != 2 or not all(parts):
            raise reader.error("pairs", f"{text!r} is not a pair written as 'A/B'")
        i = universe.symbol_index(reader, "pairs", parts[0], text)
        j = universe.symbol_index(reader, "pairs", parts[1], text)
        if i == j:
            raise reader.error("pairs", f"{text!r} pairs an instrument with itself")
        blocks.append(np.array([[i, j]], dtype=np.int64))
    for group in reader.read_names("group") or []:
        blocks.append(_pairs_within(universe.group_indices(reader, "group", group)))
    between = reader.read_names("between")
    across: tuple[str, str] | None = None
    if between is not None:
        if len(between) != 2:
            raise reader.error("between", f"expected two group names, got {between!r}")
        left = universe.group_indices(reader, "between", between[0])
        right = universe.group_indices(reader, "between", between[1])
        grid = np.array(np.meshgrid(left, right, indexing="ij")).reshape(2, -1).T
        blocks.append(grid[grid[:, 0] != grid[:, 1]].astype(np.int64))
        across = (between[0], between[1])
    stacked = np.concatenate(blocks) if blocks else np.empty((0, 2), dtype=np.int64)
    pairs = _canonical(stacked, n) if stacked.size else stacked
    if pairs.shape[0] == 0:
        raise reader.error(chosen[0], "resolves to no pairs")
    return PairTargets(labels=_pair_labels(pairs, universe.symbols), pairs=pairs,
                       between=across)


def resolve_groups(reader: TableReader, universe: Universe) -> GroupTargets:
    """Resolve a group-average rule's ``group`` (one or several) or ``all`` into group targets.

    Raises
    ------
    ConfigError
        Unknown group, a group with fewer than two instruments, or no group.
    """
    names = reader.read_names("group")
    if reader.read_bool("all"):
        if names is not None:
            raise reader.error("all", "all = true cannot be combined with group")
        names = [name for name, members in universe.groups.items() if len(members) >= 2]
    if not names:
        raise reader.error("group", "no targets: set group or all = true")
    names = list(dict.fromkeys(names))
    members: list[IntArray] = []
    blocks: list[IntArray] = []
    owners: list[IntArray] = []
    for k, name in enumerate(names):
        indices = universe.group_indices(reader, "group", name)
        if indices.size < 2:
            raise reader.error("group", f"group {name!r} has fewer than two instruments")
        members.append(indices)
        inside = _pairs_within(indices)
        blocks.append(inside)
        owners.append(np.full(inside.shape[0], k, dtype=np.int64))
    return GroupTargets(
        labels=tuple(names),
        members=tuple(members),
        pairs=np.concatenate(blocks),
        group_of_pair=np.concatenate(owners),
    )


def resolve_symbols(reader: TableReader, universe: Universe) -> SymbolTargets:
    """Resolve ``symbols``, ``group`` (union) or ``all`` into instrument targets.

    Raises
    ------
    ConfigError
        Unknown symbol or group, ``all`` combined with others, or no instrument.
    """
    chosen = [key for key in ("symbols", "group") if reader.has(key)]
    if reader.read_bool("all"):
        if chosen:
            raise reader.error("all", f"all = true cannot be combined with {chosen[0]}")
        indices = np.arange(len(universe.symbols), dtype=np.int64)
    else:
        if not chosen:
            raise reader.error("targets", "no targets: set symbols, group or all = true")
        found = [
            universe.symbol_index(reader, "symbols", symbol)
            for symbol in reader.read_names("symbols") or []
        ]
        parts = [np.array(found, dtype=np.int64)]
        for group in reader.read_names("group") or []:
            parts.append(universe.group_indices(reader, "group", group))
        indices = np.unique(np.concatenate(parts))
    if indices.size == 0:
        raise reader.error(chosen[0] if chosen else "all", "resolves to no instruments")
    labels = tuple(universe.symbols[i] for i in indices.tolist())
    return SymbolTargets(labels=labels, symbols=indices.astype(np.int64))


class PairLayout:
    """The pair list one day's measure arrays are aligned to, and lookups into it.

    Parameters
    ----------
    pairs : int array (P_all, 2)
        Column indices, ``i < j``, in the order of the engine's per-pair output.
    n_symbols : int
        Number of instruments N in the universe.

    Notes
    -----
    Build one layout per run and pass it with every day: positions of each rule's pairs
    are computed once and cached (keyed by the identity of the rule's pair array).
    """

    def __init__(self, pairs: npt.ArrayLike, n_symbols: int) -> None:
        self.pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
        self.n_symbols = int(n_symbols)
        self._codes = self.pairs[:, 0] * self.n_symbols + self.pairs[:, 1]
        self._order = np.argsort(self._codes, kind="stable")
        self._cache: dict[int, tuple[IntArray, IntArray | None]] = {}

    def __len__(self) -> int:
        return int(self.pairs.shape[0])

    def positions(self, pairs: IntArray) -> IntArray | None:
        """Row of each of ``pairs`` (M, 2) in the layout, or None when they are the layout.

        Raises
        ------
        ValueError
            A pair is not in the layout (the pipeline did not compute it).
        """
        cached = self._cache.get(id(pairs))
        if cached is not None and cached[0] is pairs:
            return cached[1]
        codes = pairs[:, 0] * self.n_symbols + pairs[:, 1]
        found: IntArray | None
        if codes.shape == self._codes.shape and np.array_equal(codes, self._codes):
            found = None
        else:
            sorted_codes = self._codes[self._order]
            where = np.searchsorted(sorted_codes, codes)
            inside = where < sorted_codes.size
            hit = np.zeros(codes.size, dtype=bool)
            hit[inside] = sorted_codes[where[inside]] == codes[inside]
            if not hit.all():
                i, j = pairs[np.flatnonzero(~hit)[0]].tolist()
                raise ValueError(f"pair ({i}, {j}) is not in the layout the measures follow")
            found = self._order[where].astype(np.int64)
        self._cache[id(pairs)] = (pairs, found)
        return found
