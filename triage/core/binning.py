"""Bin edges and mergeable binned counts: quantile edges, fine grids with tails, quantiles.

A *fine grid* has ``F + 1`` edges and ``F + 2`` cells: cell 0 holds values below the first
edge, cells ``1 .. F`` the bins ``[e_k, e_{k+1})`` (the last one closed), cell ``F + 1`` values
above the last edge. Quantiles read from such counts are within one bin width of the exact
sample quantile inside the grid; in a tail cell they interpolate between the tail's extreme value
(kept exactly) and the grid edge, so they are rough there.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from triage.errors import DataError

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def quantile_edges(values: ArrayLike, n_bins: int, *, name: str) -> FloatArray:
    """Choose bin edges at quantiles of a sample, without repeated edges.

    When the sample has at most `n_bins` distinct values, each value gets a bin of its own
    (edges half way between neighbouring values), so a 0/1 column gives two bins, not one.

    Parameters
    ----------
    values : array_like of shape (n,)
        Sample values; non-finite ones are ignored.
    n_bins : int
        Wanted number of bins (fewer come back when quantiles coincide).
    name : str
        What the values are, for the error message.

    Returns
    -------
    ndarray of shape (n_edges,)
        Increasing edges, at least two; equal first and last edge mean one constant bin.

    Raises
    ------
    DataError
        If the sample has no finite value.
    """
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        msg = f"no finite values in the sample for `{name}`; cannot choose bin edges for it"
        raise DataError(msg)
    distinct = np.unique(v)
    if distinct.size == 1:
        return np.array([distinct[0], distinct[0]])
    if distinct.size <= n_bins:
        middles = (distinct[:-1] + distinct[1:]) / 2.0
        return np.concatenate(([distinct[0]], middles, [distinct[-1]]))
    return np.unique(np.quantile(v, np.linspace(0.0, 1.0, n_bins + 1)))


def bin_index(edges: FloatArray, values: FloatArray) -> IntArray:
    """Bin of each value for ``len(edges) - 1`` bins, values outside going to the end bins.

    Bin ``k`` is ``[edges[k], edges[k + 1])``; values below the first edge fall in bin 0 and
    values at or above the last edge in the last bin.
    """
    last = max(edges.size - 2, 0)
    idx = np.searchsorted(edges, values, side="right") - 1
    return np.clip(idx, 0, last).astype(np.int64)


class BinLookup:
    """Find bins like `bin_index`, but by a uniform lookup table plus exact corrections.

    `numpy.searchsorted` took about 2.5 ms per 65,536 values on 21 edges here (it is the
    main cost of the binned residual charts, one call per chart and batch). A table of
    equal-width cells over the edges' range gives each value a first guess in O(1); moving
    the guess up or down while an edge is crossed makes the answer exactly that of
    `bin_index`, whatever the rounding.

    Parameters
    ----------
    edges : ndarray of shape (n_edges,)
        Increasing bin edges (as `quantile_edges` returns).
    cells : int, default=1024
        Cells of the lookup table.
    """

    def __init__(self, edges: FloatArray, *, cells: int = 1024) -> None:
        self.edges = np.asarray(edges, dtype=np.float64)
        self.last = max(self.edges.size - 2, 0)
        self.low = float(self.edges[0])
        span = float(self.edges[-1]) - self.low
        self.scale = cells / span if span > 0 and np.isfinite(span) else 0.0
        self.cells = cells
        starts = self.low + np.arange(cells) / self.scale if self.scale else np.full(1, self.low)
        self.table = bin_index(self.edges, starts)

    def index(self, values: FloatArray) -> IntArray:
        """Bin of each value, equal to ``bin_index(edges, values)``."""
        if not self.scale or not np.isfinite(values).all():
            return bin_index(self.edges, values)
        cell = ((values - self.low) * self.scale).astype(np.int64)
        np.clip(cell, 0, self.cells - 1, out=cell)
        idx = self.table[cell]
        edges = self.edges
        while True:  # move up while the value is at or past the next edge
            up = (idx < self.last) & (values >= edges[np.minimum(idx + 1, edges.size - 1)])
            if not up.any():
                break
            idx += up
        while True:  # move down while the value is below the bin's own edge
            down = (idx > 0) & (values < edges[idx])
            if not down.any():
                break
            idx -= down
        return idx


def fine_index(edges: FloatArray, values: FloatArray) -> IntArray:
    """Cell of each value on a fine grid with tails (see the module docstring).

    Returns
    -------
    ndarray of shape (n,)
        0 below the grid, ``k + 1`` in bin ``k``, ``len(edges)`` above the grid.
    """
    n_bins = edges.size - 1
    idx = np.searchsorted(edges, values, side="right")
    idx[values == edges[-1]] = n_bins
    return idx.astype(np.int64)


def _order_statistic(
    rank: int, counts: IntArray, cum: IntArray, edges: FloatArray, low: float, high: float
) -> float:
    """Estimate the value of 0-based rank `rank` from fine-grid counts (see module docstring)."""
    cell = int(np.searchsorted(cum, rank, side="right"))
    in_cell = counts[cell]
    pos = rank - (cum[cell] - in_cell)
    n_bins = edges.size - 1
    if cell == 0:
        est = low + pos / in_cell * (edges[0] - low)
    elif cell == n_bins + 1:
        est = high - (in_cell - 1 - pos) / in_cell * (high - edges[-1])
    else:
        lo, hi = edges[cell - 1], edges[cell]
        est = lo + (pos + 0.5) / in_cell * (hi - lo)
    return float(min(max(est, low), high))


def quantiles_from_counts(
    counts: IntArray,
    edges: FloatArray,
    low: float,
    high: float,
    probs: tuple[float, ...],
) -> tuple[float, ...]:
    """Quantiles of binned values, interpolated between order statistics as numpy's default.

    Each order statistic is placed uniformly inside its fine bin, then neighbouring order
    statistics are interpolated at ``p (n - 1)`` like ``numpy.quantile(method="linear")``.

    Parameters
    ----------
    counts : ndarray of shape (F + 2,)
        Fine-grid counts with the two tail cells.
    edges : ndarray of shape (F + 1,)
        The fine grid.
    low, high : float
        Smallest and largest value counted.
    probs : tuple of float
        Probabilities in [0, 1].

    Returns
    -------
    tuple of float
        One estimate per probability; NaN when nothing was counted.
    """
    n = int(counts.sum())
    if n == 0:
        return tuple(float("nan") for _ in probs)
    cum = np.cumsum(counts)
    out = []
    for p in probs:
        pos = p * (n - 1)
        lower = int(np.floor(pos))
        upper = min(lower + 1, n - 1)
        frac = pos - lower
        a = _order_statistic(lower, counts, cum, edges, low, high)
        b = a if upper == lower else _order_statistic(upper, counts, cum, edges, low, high)
        out.append(a + frac * (b - a))
    return tuple(out)
