"""Categorical terms as level codes: the products that involve indicator columns, without them.

A categorical with L levels codes to L - 1 indicator (0/1) columns. Written out, a batch of
n rows costs a dense n x (L - 1) block, and every product with it costs n (L - 1) times more
work than the few numbers it yields. Kept as one small integer per row (the row's level),
the same products are counts and per-level sums:

- indicator x indicator, same categorical: a weighted count per level on the diagonal, 0 off it;
- indicator x indicator, two categoricals: a weighted table of level pairs;
- indicator x numeric column: the weighted sum of that column per level (`np.bincount`).

So the Gram matrix of the whole design costs O(n (q + c)) per categorical for q numeric
columns and c categoricals, instead of O(n p^2) for p design columns, and a row's quadratic
form ``x' A x`` (leverage) O(q^2 + q c + c^2) instead of O(p^2).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.intp]


@dataclass(frozen=True, eq=False)
class IndicatorCodes:
    """One categorical term of a batch: each row's level, and each level's design column.

    Attributes
    ----------
    codes : ndarray of shape (n_rows,)
        The row's level, ``0 .. n_levels - 1``; as ``np.intp``, which `np.bincount` takes
        without a conversion per call (a uint16 array cost it 2x here).
    positions : ndarray of shape (n_levels,)
        The design column of each level's indicator, or -1 for the reference level (which
        has none).
    """

    codes: NDArray[np.integer]
    positions: IntArray

    @property
    def n_levels(self) -> int:
        """Levels of the categorical, the reference included."""
        return int(self.positions.size)


@dataclass(frozen=True, eq=False)
class CodedDesign:
    """A batch's design with its categoricals as level codes (see `IndicatorCodes`).

    Attributes
    ----------
    dense : list of ndarray of shape (n_rows,)
        The design columns that are not indicators, the intercept left out, float64.
    dense_positions : ndarray of shape (len(dense),)
        The design column of each dense column.
    factors : list of IndicatorCodes
        One per categorical term.
    n_cols : int
        Design columns in all, the intercept and every indicator included.
    has_intercept : bool
        Whether design column 0 is the intercept.
    """

    dense: list[FloatArray]
    dense_positions: IntArray
    factors: list[IndicatorCodes]
    n_cols: int
    has_intercept: bool

    @property
    def n_rows(self) -> int:
        """Rows in the batch."""
        return int(self.factors[0].codes.shape[0]) if self.factors else int(self.dense[0].size)

    def indicator_positions(self) -> IntArray:
        """Design columns of every indicator, in factor and level order."""
        return np.concatenate([f.positions[f.positions >= 0] for f in self.factors])

    def to_dense(self) -> FloatArray:
        """Write the design out as an (n_rows, n_cols) matrix (for small batches and tests)."""
        x = np.zeros((self.n_rows, self.n_cols), order="F")
        if self.has_intercept:
            x[:, 0] = 1.0
        for column, position in zip(self.dense, self.dense_positions, strict=True):
            x[:, position] = column
        rows = np.arange(self.n_rows)
        for factor in self.factors:
            position = factor.positions[factor.codes]
            has_column = position >= 0
            x[rows[has_column], position[has_column]] = 1.0
        return x


def coded_gram(
    design: CodedDesign,
    dense_block: Sequence[FloatArray],
    dense_gram: FloatArray,
    row_weights: FloatArray | None,
) -> FloatArray:
    """Return the Gram matrix ``Z' W Z`` of a coded design block in design order.

    ``Z`` holds, in design order, the intercept (when the design has one), the dense columns
    and the indicators, followed by any further columns; its dense part is given as the
    columns `dense_block` (already shifted, without the intercept: the design's dense
    columns then the further ones, such as the target) with their Gram matrix `dense_gram`
    (the intercept first when there is one, then `dense_block`, already weighted). Indicator
    columns are not shifted.

    Parameters
    ----------
    design : CodedDesign
        The batch's codes and design positions.
    dense_block : sequence of ndarray of shape (n_rows,)
        The design's dense columns (as shifted) then the further columns, unweighted.
    dense_gram : ndarray
        Weighted Gram matrix of ``[1 | dense_block]`` (or of `dense_block` without an
        intercept).
    row_weights : ndarray of shape (n_rows,) or None
        ``W``'s diagonal (for a weighted fit, the weights themselves, not their roots).

    Returns
    -------
    ndarray of shape (n_cols + n_further, n_cols + n_further)
    """
    blocks = LevelGram.of_batch(
        [f.codes for f in design.factors],
        [f.n_levels for f in design.factors],
        dense_block,
        dense_gram,
        row_weights,
        has_intercept=design.has_intercept,
    )
    n_further = len(dense_block) - len(design.dense)
    further = np.arange(design.n_cols, design.n_cols + n_further, dtype=np.intp)
    return blocks.assemble(
        np.concatenate([design.dense_positions, further]).astype(np.intp),
        [f.positions for f in design.factors],
        design.n_cols + n_further,
    )


@dataclass(eq=False)
class LevelGram:
    """The Gram matrix ``Z' W Z`` of ``[1 | dense block | an indicator of every level]``, in blocks.

    Every level of every categorical has its place, the reference level too (a design leaves
    one out, chosen later by `assemble`'s positions), so levels can be added as a pass finds
    them (`grow`) and parts that found different levels can be joined (`add`).

    Attributes
    ----------
    dense : ndarray of shape (d, d)
        Gram matrix of ``[1 | dense block]`` (no ones column without an intercept).
    counts : list of ndarray of shape (n_levels,)
        Weighted rows of each level, one array per categorical.
    sums : list of ndarray of shape (n_levels, m)
        Weighted sums of each of the m dense-block columns over each level's rows.
    pairs : dict of (int, int) to ndarray of shape (n_levels_i, n_levels_j)
        Weighted rows of each pair of levels of two categoricals ``i < j``.
    has_intercept : bool
        Whether `dense` starts with the ones column.
    """

    dense: FloatArray
    counts: list[FloatArray]
    sums: list[FloatArray]
    pairs: dict[tuple[int, int], FloatArray]
    has_intercept: bool

    @classmethod
    def of_batch(
        cls,
        codes: Sequence[NDArray[np.integer]],
        n_levels: Sequence[int],
        dense_block: Sequence[FloatArray],
        dense_gram: FloatArray,
        row_weights: FloatArray | None,
        *,
        has_intercept: bool,
    ) -> LevelGram:
        """Count and sum one batch: `codes` per categorical, `dense_block` as shifted.

        Two categoricals of few level pairs (`PAIRED_MAX_CELLS`) are summed over their pairs,
        one `np.bincount` per column, and each one's sums and counts are then added up from
        the pairs' (region by district in the benchmark: 18 bincounts a batch instead of 27).
        """
        weighted = [c if row_weights is None else c * row_weights for c in dense_block]
        paired = _paired(n_levels)
        counts: list[FloatArray | None] = [None] * len(codes)
        sums: list[FloatArray | None] = [None] * len(codes)
        pairs = {}
        for i, first in enumerate(codes):
            for j in range(i + 1, len(codes)):
                n_cells = n_levels[i] * n_levels[j]
                index = first.astype(np.intp, copy=False) * n_levels[j] + codes[j]
                table = _bincount(index, row_weights, n_cells).reshape(n_levels[i], n_levels[j])
                pairs[i, j] = table
                if (i, j) not in paired:
                    continue
                cells = np.stack([_bincount(index, c, n_cells) for c in weighted], axis=-1)
                cells = cells.reshape(n_levels[i], n_levels[j], len(weighted))
                counts[i], counts[j] = table.sum(axis=1), table.sum(axis=0)
                sums[i], sums[j] = cells.sum(axis=1), cells.sum(axis=0)
        for i, (factor, n) in enumerate(zip(codes, n_levels, strict=True)):
            if counts[i] is None:
                counts[i] = _bincount(factor, row_weights, n)
                sums[i] = np.column_stack([_bincount(factor, c, n) for c in weighted])
        return cls(
            dense_gram,
            [c for c in counts if c is not None],
            [s for s in sums if s is not None],
            pairs,
            has_intercept,
        )

    @classmethod
    def empty(cls, dense_size: int, n_levels: Sequence[int], *, has_intercept: bool) -> LevelGram:
        """Return blocks of zeros: no rows yet, `dense_size` dense columns (the ones included)."""
        m = dense_size - int(has_intercept)
        return cls(
            np.zeros((dense_size, dense_size)),
            [np.zeros(n) for n in n_levels],
            [np.zeros((n, m)) for n in n_levels],
            {
                (i, j): np.zeros((n_levels[i], n_levels[j]))
                for i in range(len(n_levels))
                for j in range(i + 1, len(n_levels))
            },
            has_intercept,
        )

    @property
    def n_levels(self) -> list[int]:
        """Levels of each categorical."""
        return [c.size for c in self.counts]

    def grow(self, n_levels: Sequence[int]) -> None:
        """Make room for levels added at the end of each categorical (zero rows so far)."""
        old = self.n_levels
        if list(n_levels) == old:
            return
        more = [n - k for n, k in zip(n_levels, old, strict=True)]
        self.counts = [np.pad(c, (0, m)) for c, m in zip(self.counts, more, strict=True)]
        self.sums = [np.pad(s, ((0, m), (0, 0))) for s, m in zip(self.sums, more, strict=True)]
        self.pairs = {
            (i, j): np.pad(t, ((0, more[i]), (0, more[j]))) for (i, j), t in self.pairs.items()
        }

    def moved(self, delta: FloatArray) -> LevelGram:
        """Return the blocks in another shift: dense column j gains ``delta[j]`` (intercept only).

        ``Z'`` is ``Z T`` with ``T = I + e0 delta'`` over ``[1 | dense block]``, so the dense
        Gram takes a rank-2 update, and each level's sums gain its count times ``delta``.
        """
        if not self.has_intercept or not delta.any():
            return self
        step = np.append(0.0, delta)
        g0 = self.dense[:, 0]
        dense = self.dense + np.outer(g0, step) + np.outer(step, g0) + g0[0] * np.outer(step, step)
        sums = [s + np.outer(c, delta) for s, c in zip(self.sums, self.counts, strict=True)]
        return LevelGram(dense, list(self.counts), sums, dict(self.pairs), self.has_intercept)

    def add(self, other: LevelGram, where: Sequence[IntArray] | None = None) -> None:
        """Add another Gram's blocks, in the same shift; `where` puts its levels among ours.

        `where[i][k]` is our level of the other's level k of categorical i (we must have
        grown to hold them); None when both have the same levels in the same order.
        """
        self.dense = self.dense + other.dense
        if where is None:
            where = [np.arange(c.size) for c in other.counts]
        for i, at in enumerate(where):
            self.counts[i][at] += other.counts[i]
            self.sums[i][at] += other.sums[i]
        for (i, j), table in other.pairs.items():
            self.pairs[i, j][np.ix_(where[i], where[j])] += table

    def assemble(
        self, dense_positions: IntArray, level_positions: Sequence[IntArray], size: int
    ) -> FloatArray:
        """Write the blocks out as one Gram matrix of `size` columns in design order.

        `dense_positions` gives the column of each dense-block column (the ones column, when
        there is one, goes to column 0); `level_positions[i][k]` the column of level k of
        categorical i, or -1 for a level without one (the reference).
        """
        intercept = [0] if self.has_intercept else []
        targets = np.concatenate([np.array(intercept, dtype=np.intp), dense_positions])
        gram = np.zeros((size, size))
        gram[np.ix_(targets, targets)] = self.dense
        has, at = [], []
        for positions in level_positions:
            has.append(positions >= 0)
            at.append(positions[positions >= 0])
        for i, (counts, sums) in enumerate(zip(self.counts, self.sums, strict=True)):
            kept = counts[has[i]]
            gram[at[i], at[i]] = kept
            if self.has_intercept:
                gram[0, at[i]] = gram[at[i], 0] = kept
            block = sums[has[i]]
            gram[np.ix_(dense_positions, at[i])] = block.T
            gram[np.ix_(at[i], dense_positions)] = block
        for (i, j), table in self.pairs.items():
            block = table[np.ix_(has[i], has[j])]
            gram[np.ix_(at[i], at[j])] = block
            gram[np.ix_(at[j], at[i])] = block.T
        return gram


PAIRED_MAX_CELLS = 4_096
"""Most level pairs of two categoricals whose per-level sums are taken over their pairs."""


def _paired(n_levels: Sequence[int]) -> set[tuple[int, int]]:
    """Pick pairs of categoricals to sum together: each at most once, fewest cells first."""
    candidates = sorted(
        (n_levels[i] * n_levels[j], i, j)
        for i in range(len(n_levels))
        for j in range(i + 1, len(n_levels))
    )
    paired: set[tuple[int, int]] = set()
    used: set[int] = set()
    for n_cells, i, j in candidates:
        if n_cells <= PAIRED_MAX_CELLS and i not in used and j not in used:
            paired.add((i, j))
            used |= {i, j}
    return paired


def _bincount(codes: NDArray[np.integer], values: FloatArray | None, n: int) -> FloatArray:
    """Sum `values` (or count rows, for None) per code ``0 .. n - 1``."""
    return np.bincount(codes, weights=values, minlength=n).astype(np.float64, copy=False)
