"""Categorical terms as level codes: the products that involve indicator columns, without them.

A categorical with L levels codes to L - 1 indicator (0/1) columns. Written out, a batch of
n rows costs a dense n x (L - 1) block, and every product with it costs n (L - 1) times more
work than the few numbers it yields. Kept as one small integer per row (the row's level),
the same products are counts and per-level sums:

- indicator x indicator, same categorical: a weighted count per level on the diagonal, 0 off it;
- indicator x indicator, two categoricals: a weighted table of level pairs;
- indicator x numeric column: the weighted sum of that column per level (`level_grams`).

So the Gram matrix of the whole design costs O(n (q + c)) per categorical for q numeric
columns and c categoricals, instead of O(n p^2) for p design columns, and a row's quadratic
form ``x' A x`` (leverage) O(q^2 + q c + c^2) instead of O(p^2).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Final

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
    columns: Sequence[FloatArray],
    shifts: FloatArray,
    row_weights: FloatArray | None,
    root_weights: FloatArray | None,
) -> FloatArray:
    """Return the Gram matrix ``Z' W Z`` of a coded design block in design order.

    ``Z`` holds, in design order, the intercept (when the design has one), the dense columns
    less `shifts` and the indicators (not shifted), followed by any further columns less
    theirs: `columns` are the design's dense columns then the further ones (such as the
    target), unshifted and unweighted.

    Parameters
    ----------
    design : CodedDesign
        The batch's codes and design positions.
    columns : sequence of ndarray of shape (n_rows,)
        The design's dense columns then the further columns.
    shifts : ndarray of shape (len(columns),)
        What each column is shifted by.
    row_weights, root_weights : ndarray of shape (n_rows,) or None
        ``W``'s diagonal and its square roots (None for no weights).

    Returns
    -------
    ndarray of shape (n_cols + n_further, n_cols + n_further)
    """
    (blocks,) = level_grams(
        [f.codes for f in design.factors],
        [f.n_levels for f in design.factors],
        columns,
        shifts,
        [SummedBlock(len(columns), row_weights, root_weights)],
        has_intercept=design.has_intercept,
    )
    n_further = len(columns) - len(design.dense)
    further = np.arange(design.n_cols, design.n_cols + n_further, dtype=np.intp)
    return blocks.assemble(
        np.concatenate([design.dense_positions, further]).astype(np.intp),
        [f.positions for f in design.factors],
        design.n_cols + n_further,
    )


@dataclass(frozen=True, eq=False)
class SummedBlock:
    """One block of `level_grams`: its leading columns and their row weights.

    Attributes
    ----------
    n_columns : int
        How many of the leading columns the block holds.
    row_weights : ndarray of shape (n_rows,) or None
        Each row's weight; None counts rows.
    root_weights : ndarray of shape (n_rows,) or None
        The weights' square roots, for the dense Gram matrix (taken from `row_weights` when
        None and there are weights: pass them when at hand, so no square root is taken again).
    """

    n_columns: int
    row_weights: FloatArray | None = None
    root_weights: FloatArray | None = None

    def roots(self) -> FloatArray | None:
        """Return the square roots of the row weights (None without weights)."""
        if self.root_weights is not None or self.row_weights is None:
            return self.root_weights
        return np.sqrt(self.row_weights)


def level_grams(
    codes: Sequence[NDArray[np.integer]],
    n_levels: Sequence[int],
    columns: Sequence[FloatArray],
    shifts: FloatArray,
    blocks: Sequence[SummedBlock],
    *,
    has_intercept: bool,
) -> list[LevelGram]:
    """Count and sum one batch per level and level pair, for several blocks at once.

    `codes[i]` holds each row's level of categorical i, of `n_levels[i]`; block b is the
    first ``blocks[b].n_columns`` of `columns`, less `shifts`, weighted by its row weights.
    The rows are written once as ``[1 | columns - shifts]`` and each grouping of the rows (a
    categorical, or a pair of categoricals of few level pairs, `PAIRED_MAX_CELLS`) sums
    every column of a block per level in one product with a sparse matrix of the block's
    weights at each row's level (`_level_sums`). Two categoricals summed over their pairs
    give each one's sums and counts by adding up the pairs' (region by district in the
    benchmark: two groupings a batch instead of three). The pair indices are computed once
    for all the blocks.

    Returns
    -------
    list of LevelGram
        One per block, in the order of `blocks`.
    """
    n_rows = len(columns[0]) if columns else len(codes[0])
    width = 1 + len(columns)
    rows, grams = _rows_and_grams(columns, shifts, [b.roots() for b in blocks], n_rows)
    counts: list[list[FloatArray]] = [[] for _ in blocks]
    sums: list[list[FloatArray]] = [[] for _ in blocks]
    pairs: list[dict[tuple[int, int], FloatArray]] = [{} for _ in blocks]
    by_level: list[list[FloatArray] | None] = [None] * len(codes)
    paired = _paired(n_levels)
    for i, codes_i in enumerate(codes):
        for j in range(i + 1, len(codes)):
            n_i, n_j = n_levels[i], n_levels[j]
            index = codes_i.astype(np.intp, copy=False) * n_j + codes[j]
            if (i, j) not in paired:
                for b, block in enumerate(blocks):
                    table = _bincount(index, block.row_weights, n_i * n_j)
                    pairs[b][i, j] = table.reshape(n_i, n_j)
                continue
            cells = [
                c.reshape(n_i, n_j, width) for c in _level_sums(index, n_i * n_j, rows, blocks)
            ]
            for b, block_cells in enumerate(cells):
                pairs[b][i, j] = block_cells[..., 0].copy()
            by_level[i] = [c.sum(axis=1) for c in cells]
            by_level[j] = [c.sum(axis=0) for c in cells]
    for i, (factor, n) in enumerate(zip(codes, n_levels, strict=True)):
        levels = by_level[i] or _level_sums(factor, n, rows, blocks)
        for b, block in enumerate(blocks):
            counts[b].append(levels[b][:, 0].copy())
            sums[b].append(levels[b][:, 1 : 1 + block.n_columns].copy())
    kept = [np.arange(0 if has_intercept else 1, 1 + b.n_columns) for b in blocks]
    return [
        LevelGram(gram[np.ix_(k, k)], c, s, t, has_intercept)
        for gram, k, c, s, t in zip(grams, kept, counts, sums, pairs, strict=True)
    ]


def _level_sums(
    index: NDArray[np.integer], n_cells: int, rows: FloatArray, blocks: Sequence[SummedBlock]
) -> list[FloatArray]:
    """Sum each block's weighted `rows` per cell of `index`: an (n_cells, width) array a block.

    As ``S @ rows`` with ``S`` the sparse (n_cells, n_rows) matrix of each row's weight at its
    cell: scipy walks the rows once, adding each to its cell's row, every column at once.
    Measured here on 125,000 rows of 8 columns in 720 cells: 0.46 ms (0.06 ms a column)
    against 0.14 ms a column for `np.bincount` on a column of its own, and more from a
    column of a matrix (strided). scipy.sparse is imported here, on first use: importing it
    costs about 0.12 CPU-s, which a command without categoricals need not pay.
    """
    from scipy import sparse

    index = index.astype(np.intp, copy=False)
    starts = np.arange(index.size + 1)
    ones: FloatArray | None = None
    out = []
    for block in blocks:
        weights = block.row_weights
        if weights is None:
            ones = np.ones(index.size) if ones is None else ones
            weights = ones
        spread = sparse.csc_array((weights, index, starts), shape=(n_cells, index.size))
        out.append(np.asarray(spread @ rows))
    return out


def _rows_and_grams(
    columns: Sequence[FloatArray],
    shifts: FloatArray,
    roots: Sequence[FloatArray | None],
    n_rows: int,
) -> tuple[FloatArray, list[FloatArray]]:
    """Write ``[1 | columns - shifts]`` row by row, and each ``sqrt(w)``-weighted Gram matrix of it.

    `GRAM_CHUNK_ROWS` rows at a time: a chunk is written column by column (contiguous
    writes), multiplied and multiplied out while in cache, then copied into the rows.
    Every Gram matrix is of all the columns: measured here, a product of 8,192 rows of the
    7 first of 8 columns took 77 us, of all 8 45 us.
    """
    width = 1 + len(columns)
    rows = np.empty((n_rows, width))
    chunk = np.empty((width, min(n_rows, GRAM_CHUNK_ROWS)))
    scaled = np.empty_like(chunk)
    grams = [np.zeros((width, width)) for _ in roots]
    for start in range(0, n_rows, GRAM_CHUNK_ROWS):
        stop = min(start + GRAM_CHUNK_ROWS, n_rows)
        z = chunk[:, : stop - start]
        z[0] = 1.0
        for j, (column, shift) in enumerate(zip(columns, shifts, strict=True), start=1):
            np.subtract(column[start:stop], shift, out=z[j])
        for gram, root in zip(grams, roots, strict=True):
            part = (
                z if root is None else np.multiply(z, root[start:stop], out=scaled[:, : z.shape[1]])
            )
            gram += np.dot(part, part.T)  # not `@`: see DEVELOPERS.md, products and threads
        rows[start:stop] = z.T
    return rows, grams


GRAM_CHUNK_ROWS: Final = 8192
"""Rows of a batch shifted and multiplied at a time when its Gram matrix is formed from its
columns, so each chunk is still in cache for the product. Measured here: 262,144 rows of 10
columns took 9.1 ms whole and 7.1 ms in chunks of 8,192 rows; 65,536 rows of 32 columns 10.2
and 6.9 ms (chunks of 2,048 to 32,768 rows were tried).
"""


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
