"""Exact bounded top-k of rows by a score, mergeable, with ties broken by row position."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def _select_top(keys: FloatArray, rows: IntArray, k: int) -> IntArray:
    """Return indices of the `k` largest keys, ties at the cut by lowest row; O(n), unordered."""
    n = keys.size
    if k <= 0:
        return np.empty(0, dtype=np.int64)
    if n <= k:
        return np.arange(n)
    threshold = np.partition(keys, n - k)[n - k]
    above = np.flatnonzero(keys > threshold)
    tied = np.flatnonzero(keys == threshold)
    need = k - above.size
    if tied.size > need:
        tied = tied[np.argpartition(rows[tied], need - 1)[:need]]
    return np.concatenate((above, tied))


class TopRows:
    """The `k` rows with the largest score seen so far, each with its payload values.

    The order is score descending, then row position ascending, so the result is exactly the
    first `k` rows of a full sort whatever the batching. Rows whose score is NaN are skipped.

    Parameters
    ----------
    k : int
        How many rows to keep.
    fields : tuple of str
        Names of the per-row payload values kept alongside the score.
    """

    def __init__(self, k: int, fields: tuple[str, ...]) -> None:
        self.k = k
        self.fields = fields
        self.scores: FloatArray = np.empty(0)
        self.rows: IntArray = np.empty(0, dtype=np.int64)
        self.payload: dict[str, FloatArray] = {f: np.empty(0) for f in fields}

    def update(self, scores: FloatArray, rows: IntArray, payload: dict[str, FloatArray]) -> None:
        """Offer a batch of rows; keeps the best `k` of those kept and those offered."""
        if self.scores.size == self.k and self.k > 0:
            # Once k rows are kept, only a score at or above the k-th best can enter (ties
            # may win on row position); this drops nearly every row of later batches before
            # the O(n) selection, and also drops NaN scores (NaN >= x is false).
            keep = np.flatnonzero(scores >= self.scores[-1])
        else:
            keep = np.flatnonzero(~np.isnan(scores))
        pick = keep[_select_top(scores[keep], rows[keep], self.k)]
        self._combine(scores[pick], rows[pick], {f: payload[f][pick] for f in self.fields})

    def merge(self, other: TopRows) -> None:
        """Fold another `TopRows` with the same `k` and fields into this one."""
        self._combine(other.scores, other.rows, other.payload)

    def _combine(self, scores: FloatArray, rows: IntArray, payload: dict[str, FloatArray]) -> None:
        """Keep the best `k` of the current rows and the given ones, in final order."""
        all_scores = np.concatenate((self.scores, scores))
        all_rows = np.concatenate((self.rows, rows))
        order = np.lexsort((all_rows, -all_scores))[: self.k]
        self.scores = all_scores[order]
        self.rows = all_rows[order]
        self.payload = {
            f: np.concatenate((self.payload[f], payload[f]))[order] for f in self.fields
        }
