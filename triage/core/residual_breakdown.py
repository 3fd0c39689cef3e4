"""Weighted residuals broken down by a binned variable or by the levels of a segment column.

Both parts of pass 2 are mergeable: bins keep counts, means and a fine residual histogram;
segments keep count, mean and sum of squares per level.
"""

from __future__ import annotations

import functools
import itertools
import math
from typing import Any, Final

import numpy as np
import polars as pl
from numpy.typing import NDArray

from triage.core.binning import BinLookup, pack_counts, quantiles_from_counts, unpack_counts
from triage.core.levels import category_codes, positions_in
from triage.core.moments import pool_groups, pool_values
from triage.results.diagnostics import ResidualBin, SegmentLevel

__all__ = ["MISSING_LEVEL", "OTHER_LEVEL", "BinnedResiduals", "SegmentResiduals"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

OTHER_LEVEL: Final = "(other)"
"""Segment level pooling the levels seen after `max_segment_levels` distinct ones."""


MISSING_LEVEL: Final = "(missing)"
"""Segment level of rows whose segment value is null (or NaN for a numeric column)."""


_BIN_QUANTILES: Final = (0.1, 0.5, 0.9)


class BinnedResiduals:
    """Weighted residuals binned by one variable, each bin with a fine residual histogram.

    Per bin, the smallest residual below the fine grid and the largest above it are kept
    exactly (the quantiles of a tail cell interpolate towards them); inside the grid the
    fine cells alone place the quantiles.
    """

    def __init__(self, edges: FloatArray, fine_edges: FloatArray) -> None:
        self.edges = edges
        self.lookup = BinLookup(edges)
        self.fine_edges = fine_edges
        n_bins = max(edges.size - 1, 1)
        self.counts = np.zeros((n_bins, fine_edges.size + 1), dtype=np.int64)
        self.sum_x = np.zeros(n_bins)
        self.sum_e = np.zeros(n_bins)
        self.min_e = np.full(n_bins, np.inf)
        self.max_e = np.full(n_bins, -np.inf)
        # Extremes of the values the lookup checked exactly (near an edge or outside the
        # edges): `finalize` needs them only where they lie beyond the end edges.
        self.min_x = math.inf
        self.max_x = -math.inf

    def __getstate__(self) -> dict[str, Any]:
        """Pickle the fine counts packed small (`pack_counts`)."""
        state = self.__dict__.copy()
        state["counts"] = pack_counts(self.counts)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        """Restore a pickled accumulator, its counts as int64 again."""
        state["counts"] = unpack_counts(state["counts"])
        self.__dict__.update(state)

    def update(
        self, x: FloatArray, e: FloatArray, cell: IntArray, below: IntArray, above: IntArray
    ) -> None:
        """Add values `x` with residuals `e` in fine-grid cells `cell` (`BinLookup.fine`).

        `below` and `above` index the rows in the tail cells below and above the grid.
        """
        n_bins, n_cells = self.counts.shape
        # Each row's first cell of its bin in the flat (bin, residual cell) counts: the bins'
        # sums fall on every n_cells-th entry of a bincount over it, summed in the same order
        # as over the bins themselves (one pass fewer than scaling the bins afterwards).
        start, exact = self.lookup.index_and_exact(x, stride=n_cells)
        size = n_bins * n_cells
        self.sum_x += np.bincount(start, weights=x, minlength=size)[::n_cells]
        self.sum_e += np.bincount(start, weights=e, minlength=size)[::n_cells]
        np.minimum.at(self.min_e, start[below] // n_cells, e[below])
        np.maximum.at(self.max_e, start[above] // n_cells, e[above])
        if exact.size:  # every value outside the edges is among these
            outside = x[exact]
            self.min_x = min(self.min_x, float(outside.min()))
            self.max_x = max(self.max_x, float(outside.max()))
        start += cell  # from here on, the cell of each row's (bin, residual) pair
        self.counts += np.bincount(start, minlength=size).reshape(n_bins, n_cells)

    def merge(self, other: BinnedResiduals) -> None:
        """Add the bins of `other` (same edges) to these."""
        self.counts += other.counts
        self.sum_x += other.sum_x
        self.sum_e += other.sum_e
        np.minimum(self.min_e, other.min_e, out=self.min_e)
        np.maximum(self.max_e, other.max_e, out=self.max_e)
        self.min_x = min(self.min_x, other.min_x)
        self.max_x = max(self.max_x, other.max_x)

    def finalize(self) -> tuple[ResidualBin, ...]:
        """Return one summary per bin, in ascending order."""
        n_bins = self.counts.shape[0]
        out = []
        for k in range(n_bins):
            n = int(self.counts[k].sum())
            lo, hi = float(self.edges[k]), float(self.edges[min(k + 1, self.edges.size - 1)])
            if k == 0:
                lo = min(lo, self.min_x)
            if k == n_bins - 1:
                hi = max(hi, self.max_x)
            # with no row beyond the grid on a side, the grid's end bounds that side
            low = min(float(self.min_e[k]), float(self.fine_edges[0]))
            high = max(float(self.max_e[k]), float(self.fine_edges[-1]))
            q = quantiles_from_counts(self.counts[k], self.fine_edges, low, high, _BIN_QUANTILES)
            nan = math.nan
            out.append(
                ResidualBin(
                    lo=lo,
                    hi=hi,
                    n=n,
                    x_mean=self.sum_x[k] / n if n else nan,
                    mean_resid=self.sum_e[k] / n if n else nan,
                    q10=q[0],
                    q50=q[1],
                    q90=q[2],
                )
            )
        return tuple(out)


def _interval_labels(cuts: FloatArray) -> list[str]:
    """Level names of the bins cut at `cuts`: below the first, between, from the last on."""
    if cuts.size == 0:
        return ["(all)"]
    text = [f"{c:.6g}" for c in cuts]
    middle = [f"[{a}, {b})" for a, b in itertools.pairwise(text)]
    return [f"< {text[0]}", *middle, f">= {text[-1]}"]


ROUNDING_MEAN: Final = 1e-9
"""A segment's mean residual below this fraction of its RMSE is taken as exactly zero."""


class SegmentResiduals:
    """Count, mean and Σ(e - mean)² of weighted residuals per level of one column."""

    def __init__(self, column: str, cuts: FloatArray | None, max_levels: int) -> None:
        self.column = column
        self.cuts = cuts
        self.max_levels = max_levels
        self.labels: list[str] = []
        self.index: dict[str, int] = {}
        self.is_capped = False
        if cuts is not None:
            for label in [*_interval_labels(cuts), MISSING_LEVEL]:
                self._add(label)
        self.count = np.zeros(len(self.labels))
        self.mean = np.zeros(len(self.labels))
        self.m2 = np.zeros(len(self.labels))

    def _add(self, label: str) -> int:
        self.index[label] = len(self.labels)
        self.labels.append(label)
        return self.index[label]

    def _other(self) -> int:
        self.is_capped = True
        return self.index[OTHER_LEVEL] if OTHER_LEVEL in self.index else self._add(OTHER_LEVEL)

    def _target(self, label: str) -> int:
        """Index for a label, adding it while there is room, else the pooled level."""
        if label in self.index:
            return self.index[label]
        if label != OTHER_LEVEL and len(self.labels) - (OTHER_LEVEL in self.index) < (
            self.max_levels
        ):
            return self._add(label)
        return self._other()

    def _codes(self, series: pl.Series) -> IntArray:
        if self.cuts is not None:
            values = series.cast(pl.Float64).to_numpy()
            codes = np.searchsorted(self.cuts, values, side="right").astype(np.int64)
            codes[np.isnan(values)] = self.index[MISSING_LEVEL]
            return codes
        return self._level_codes(series)

    def _level_codes(self, series: pl.Series) -> IntArray:
        """Index of each row's level, adding the batch's new levels in the order first met.

        Through a Categorical's ids (`category_codes`): only the batch's distinct values are
        matched as text. 0.4 ms instead of 4.4 for 110,749 rows of a 60-level column
        (measured here); text is cast to a Categorical first.
        """
        if not isinstance(series.dtype, pl.Categorical):
            series = series.cast(pl.String).cast(pl.Categorical)
        if series.null_count():
            series = series.fill_null(MISSING_LEVEL)
        known = functools.partial(positions_in, self.index)
        codes, _ = category_codes(series, known, self._indices_of)
        return codes

    def _indices_of(self, labels: list[str]) -> list[int]:
        """Index of each label, adding new ones in order while there is room."""
        for label in labels:
            if label not in self.index:
                self._target(label)
                if self.is_capped:
                    break  # no room left: every later new level goes to the pooled one as well
        fallback = self.index.get(OTHER_LEVEL, -1)
        return [self.index.get(label, fallback) for label in labels]

    def _absorb(self, index: IntArray, count: FloatArray, mean: FloatArray, m2: FloatArray) -> None:
        size = len(self.labels)
        old = np.arange(self.count.size)
        self.count, self.mean, self.m2 = pool_groups(
            np.concatenate((old, index)),
            np.concatenate((self.count, count)),
            np.concatenate((self.mean, mean)),
            np.concatenate((self.m2, m2)),
            size,
        )

    def update(self, series: pl.Series, e: FloatArray) -> None:
        """Add the residuals `e` of rows whose segment values are `series`."""
        codes = self._codes(series)
        self.count, self.mean, self.m2 = pool_values(
            codes, e, self.count, self.mean, self.m2, len(self.labels)
        )

    def merge(self, other: SegmentResiduals) -> None:
        """Add the levels of `other`; a level past the cap goes to `OTHER_LEVEL`."""
        index = np.array([self._target(label) for label in other.labels], dtype=np.int64)
        self.is_capped = self.is_capped or other.is_capped
        self._absorb(index, other.count, other.mean, other.m2)

    def finalize(self) -> tuple[SegmentLevel, ...]:
        """Return the non-empty levels by ``|t|`` descending (NaN last)."""
        out = []
        for j, label in enumerate(self.labels):
            n = int(self.count[j])
            if n == 0:
                continue
            mean, m2 = float(self.mean[j]), float(self.m2[j])
            rmse = math.sqrt(m2 / n + mean * mean)
            if abs(mean) <= ROUNDING_MEAN * rmse:
                # Zero up to rounding, as for a column that is itself in the model: a t of
                # rounding noise would order the levels at random.
                mean = 0.0
            t = mean / math.sqrt(m2 / (n - 1) / n) if n > 1 and m2 > 0.0 else math.nan
            out.append(SegmentLevel(level=label, n=n, mean_resid=mean, rmse=rmse, t=t))
        # Largest |t| first; ties (say every level at 0) by size, then by name.
        out.sort(
            key=lambda lev: (
                math.isnan(lev.t),
                -abs(lev.t) if not math.isnan(lev.t) else 0.0,
                -lev.n,
                lev.level,
            )
        )
        return tuple(out)
