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


def level_sums(factor: IndicatorCodes, values: FloatArray | None) -> FloatArray:
    """Sum `values` (or count rows, for None) per level of `factor`."""
    return np.bincount(factor.codes, weights=values, minlength=factor.n_levels).astype(
        np.float64, copy=False
    )


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
    n_further = len(dense_block) - len(design.dense)
    size = design.n_cols + n_further
    # Where each column of the dense Gram goes: intercept, dense columns, further columns.
    targets = np.concatenate(
        [
            [0] if design.has_intercept else np.zeros(0, dtype=np.intp),
            design.dense_positions,
            np.arange(design.n_cols, size),
        ]
    ).astype(np.intp)
    gram = np.zeros((size, size))
    gram[np.ix_(targets, targets)] = dense_gram
    weighted = [c if row_weights is None else c * row_weights for c in dense_block]
    for i, factor in enumerate(design.factors):
        has_column = factor.positions >= 0
        at = factor.positions[has_column]
        counts = level_sums(factor, row_weights)[has_column]
        gram[at, at] = counts
        if design.has_intercept:
            gram[0, at] = gram[at, 0] = counts
        for target, column in zip(targets[int(design.has_intercept) :], weighted, strict=True):
            sums = level_sums(factor, column)[has_column]
            gram[target, at] = gram[at, target] = sums
        for other in design.factors[i + 1 :]:
            pairs = factor.codes.astype(np.intp, copy=False) * other.n_levels + other.codes
            table = np.bincount(
                pairs, weights=row_weights, minlength=factor.n_levels * other.n_levels
            ).reshape(factor.n_levels, other.n_levels)
            other_has = other.positions >= 0
            block = table[np.ix_(has_column, other_has)]
            other_at = other.positions[other_has]
            gram[np.ix_(at, other_at)] = block
            gram[np.ix_(other_at, at)] = block.T
    return gram
