"""Which pairs a computation covers: a tile (block of instruments I x J) or a pair list.

A layout owns the shape of the output and the operations every kernel needs: ``cross``
(sum over the window axis of left x right products, for every covered pair; ``cross_many``
for several left factors at once), ``left`` / ``right`` (lift a per-instrument vector so
that it broadcasts against the output) and ``split`` (which pairs the fast path may serve,
and which rows, columns or pairs the general path must overwrite). Kernels are written
once against these and serve both a tile and a pair list; a tile is the unit a
distributed engine can later hand out.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from monitor.errors import EngineInputError

IntArray = npt.NDArray[np.intp]
BoolArray = npt.NDArray[np.bool_]
FloatArray = npt.NDArray[np.float64]
AnyArray = npt.NDArray[Any]

Selector = tuple[IntArray | slice, ...]
"""Index tuple placing a sub-layout's values inside its parent's arrays."""

Split = tuple[bool, list[tuple["Layout", Selector]]]
"""How to compute a layout: ``(base_is_fast, overrides)``.

The whole layout is computed first (by the fast path when ``base_is_fast``); each
``(sub_layout, selector)`` override is then computed by the general path and written over
it with ``out[selector] = sub_values``. The fast path's values for pairs that touch a bad
instrument are wrong or NaN, but only in the rows and columns the overrides replace.
"""

BLAS_MIN_MULTIPLY_ADDS = 20_000_000
"""Window products smaller than this (and with more than 8 rows) avoid BLAS."""

OVERRIDE_SHARE = 0.75
"""Above this share of pairs touching a bad instrument, the general path does the whole."""


class Layout(Protocol):
    """What kernels need to know about the pairs they compute."""

    @property
    def shape(self) -> tuple[int, ...]: ...

    @property
    def left_index(self) -> IntArray: ...

    @property
    def right_index(self) -> IntArray: ...

    @property
    def symmetric(self) -> bool: ...

    def cross(self, a: FloatArray, b: FloatArray) -> FloatArray: ...

    def cross_many(self, lefts: list[FloatArray], b: FloatArray) -> list[FloatArray]: ...

    def left(self, v: AnyArray) -> AnyArray: ...

    def right(self, v: AnyArray) -> AnyArray: ...

    def split(self, good_left: BoolArray, good_right: BoolArray) -> Split: ...

    def pairs(self) -> tuple[IntArray, IntArray]: ...


def sorted_unique(values: npt.ArrayLike) -> IntArray:
    """The distinct values of an int array, ascending, by one sort.

    Same result as ``np.unique``; numpy 2's hash-based ``np.unique`` takes about 20 s on
    the 4.5 million pair codes of a rule over every pair of 3,000 instruments (measured
    with numpy 2.4 on the CI machine), a sort about 0.8 s.
    """
    flat = np.sort(np.asarray(values, dtype=np.int64).reshape(-1))
    if flat.size == 0:
        return flat
    keep = np.empty(flat.size, dtype=bool)
    keep[0] = True
    np.not_equal(flat[1:], flat[:-1], out=keep[1:])
    return flat[keep]


def _as_index(values: npt.ArrayLike, name: str) -> IntArray:
    index = np.asarray(values)
    if index.ndim != 1 or (index.size and not np.issubdtype(index.dtype, np.integer)):
        raise EngineInputError(f"{name} must be a 1-D integer array, got shape {index.shape}")
    return index.astype(np.intp, copy=False)


@dataclass(frozen=True, eq=False)
class TileLayout:
    """A block of the pair matrix: instruments ``rows`` (I,) against instruments ``cols`` (J,).

    Output arrays have shape (I, J); entry (a, b) is the pair (rows[a], cols[b]).
    """

    rows: IntArray
    cols: IntArray

    @classmethod
    def of(cls, rows: npt.ArrayLike, cols: npt.ArrayLike) -> TileLayout:
        return cls(_as_index(rows, "rows"), _as_index(cols, "cols"))

    @property
    def shape(self) -> tuple[int, ...]:
        return (self.rows.size, self.cols.size)

    @property
    def left_index(self) -> IntArray:
        return self.rows

    @property
    def right_index(self) -> IntArray:
        return self.cols

    @property
    def symmetric(self) -> bool:
        """True for a diagonal tile (rows == cols): right-side sums are left-side transposes."""
        return self.rows is self.cols or (
            self.rows.shape == self.cols.shape and bool(np.array_equal(self.rows, self.cols))
        )

    def cross(self, a: FloatArray, b: FloatArray) -> FloatArray:
        """(..., I, W) x (..., J, W) -> (..., I, J): sum over the window axis of products.

        Medium products inside a stream go through numpy's own loops, not BLAS: a threaded
        BLAS leaves its threads spinning after each call, and on a busy machine they take
        the CPU from the elementwise work that follows (measured: 2x slower overall).
        Large one-off products (the daily run of thousands of instruments) use BLAS.
        """
        size = (
            a.shape[-1] * a.shape[-2] * b.shape[-2] * (a.size // max(1, a.shape[-1] * a.shape[-2]))
        )
        if b.shape[-1] > 8 and size < BLAS_MIN_MULTIPLY_ADDS:
            return np.einsum("...iw,...jw->...ij", a, b)
        right = np.swapaxes(b, -1, -2)
        if b.shape[-1] <= 8:
            # a short inner axis (row updates): a contiguous copy keeps BLAS on its fast path
            right = np.ascontiguousarray(right)
        # both operands row-major with the window last: one BLAS product per day
        return np.matmul(a, right)

    def cross_many(self, lefts: list[FloatArray], b: FloatArray) -> list[FloatArray]:
        """``[cross(a, b) for a in lefts]`` as one product of the stacked left factors.

        Fewer, larger matrix products: less call overhead, and a threaded BLAS has
        enough work per call to pay for its threads.
        """
        if len(lefts) == 1:
            return [self.cross(lefts[0], b)]
        stacked = np.concatenate(lefts, axis=-2)
        product = self.cross(stacked, b)
        rows = self.rows.size
        return [product[..., k * rows : (k + 1) * rows, :] for k in range(len(lefts))]

    def left(self, v: AnyArray) -> AnyArray:
        """(..., I) -> (..., I, 1)."""
        return v[..., :, None]

    def right(self, v: AnyArray) -> AnyArray:
        """(..., J) -> (..., 1, J)."""
        return v[..., None, :]

    def split(self, good_left: BoolArray, good_right: BoolArray) -> Split:
        """Plan the tile: fast path for all, general path over the rows/columns of bad ones.

        ``good_left`` (I,) and ``good_right`` (J,) flag the instruments the fast path can
        serve; see :data:`Split`.
        """
        rows_bad = np.flatnonzero(~good_left)
        cols_bad = np.flatnonzero(~good_right)
        if rows_bad.size == 0 and cols_bad.size == 0:
            return True, []
        rows, cols = self.shape
        touched = rows_bad.size * cols + rows * cols_bad.size
        if touched >= OVERRIDE_SHARE * rows * cols:
            return False, []
        overrides: list[tuple[Layout, Selector]] = []
        if rows_bad.size:
            overrides.append((TileLayout(self.rows[rows_bad], self.cols), (rows_bad,)))
        if cols_bad.size:
            overrides.append((TileLayout(self.rows, self.cols[cols_bad]), (slice(None), cols_bad)))
        return True, overrides

    def pairs(self) -> tuple[IntArray, IntArray]:
        """Every covered pair as flat (I*J,) left and right instrument indices, row-major."""
        left = np.repeat(self.rows, self.cols.size)
        right = np.tile(self.cols, self.rows.size)
        return left, right


@dataclass(frozen=True, eq=False)
class PairLayout:
    """An explicit list of pairs: (P,) left and (P,) right instrument indices."""

    left_index: IntArray
    right_index: IntArray

    @classmethod
    def of(cls, pairs: npt.ArrayLike) -> PairLayout:
        table = np.asarray(pairs)
        if table.ndim != 2 or table.shape[1] != 2:
            raise EngineInputError(
                f"pairs must be an integer array of shape (P, 2), got {table.shape}")
        if table.size and not np.issubdtype(table.dtype, np.integer):
            raise EngineInputError(f"pairs must hold integer instrument indices, got {table.dtype}")
        table = table.astype(np.intp, copy=False)
        return cls(table[:, 0].copy(), table[:, 1].copy())

    @property
    def shape(self) -> tuple[int, ...]:
        return (self.left_index.size,)

    @property
    def symmetric(self) -> bool:
        return False

    def cross(self, a: FloatArray, b: FloatArray) -> FloatArray:
        """(..., P, W) x (..., P, W) -> (..., P): per-pair sum over the window axis."""
        return np.einsum("...pw,...pw->...p", a, b)

    def cross_many(self, lefts: list[FloatArray], b: FloatArray) -> list[FloatArray]:
        return [self.cross(a, b) for a in lefts]

    def left(self, v: AnyArray) -> AnyArray:
        return v

    def right(self, v: AnyArray) -> AnyArray:
        return v

    def split(self, good_left: BoolArray, good_right: BoolArray) -> Split:
        """Plan the list: fast path for all, general path over pairs with a bad side."""
        bad = np.flatnonzero(~(good_left & good_right))
        if bad.size == 0:
            return True, []
        if bad.size >= OVERRIDE_SHARE * self.left_index.size:
            return False, []
        return True, [(PairLayout(self.left_index[bad], self.right_index[bad]), (bad,))]

    def pairs(self) -> tuple[IntArray, IntArray]:
        return self.left_index, self.right_index
