"""Bin edges and mergeable binned counts: quantile edges, fine grids with tails, quantiles.

A *fine grid* has ``F + 1`` edges and ``F + 2`` cells: cell 0 holds values below the first
edge, cells ``1 .. F`` the bins ``[e_k, e_{k+1})`` (the last one closed), cell ``F + 1`` values
above the last edge. Quantiles read from such counts are within one bin width of the exact
sample quantile inside the grid; in a tail cell they interpolate between the tail's extreme value
(kept exactly) and the grid edge, so they are rough there.
"""

from __future__ import annotations

import zlib
from typing import Any, Final

import numpy as np
from numpy.typing import ArrayLike, NDArray

from triage.errors import DataError

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


EDGE_SAMPLE_VALUES: Final = 65_536
"""Most sample values that bin edges are chosen from, taken evenly through the sample.

Finding the distinct values and quantiles of a 1,000,000-row learning sample for each of
nine charts took over a second here; 20 quantiles of 65,536 values are as good for edges.
"""


def edge_sample(values: ArrayLike) -> FloatArray:
    """Return the values `quantile_edges` chooses edges from: the finite ones, thinned evenly.

    At most `EDGE_SAMPLE_VALUES`, taken at equal steps through the sample in its order.
    Thinning again changes nothing, so a caller may thin a long sample first and keep
    only what `quantile_edges` would look at.
    """
    v = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(v)
    if not finite.all():  # most samples hold no gap: no copy of every value then
        v = v[finite]
    return v[:: -(-v.size // EDGE_SAMPLE_VALUES)].copy() if v.size else v


def quantile_edges(values: ArrayLike, n_bins: int, *, name: str) -> FloatArray:
    """Choose bin edges at quantiles of a sample, without repeated edges.

    When the sample has at most `n_bins` distinct values, each value gets a bin of its own
    (edges half way between neighbouring values), so a 0/1 column gives two bins, not one.

    Parameters
    ----------
    values : array_like of shape (n,)
        Sample values; non-finite ones are ignored, and at most `EDGE_SAMPLE_VALUES` are used.
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
    v = edge_sample(values)
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


MAX_LOOKUP_CELLS: Final = 65_536
"""Most cells of a `BinLookup` table (512 KiB), so the table stays in the processor's cache."""

_UNCERTAIN: Final = -1
"""Table entry of a cell whose values go to `numpy.searchsorted`."""

LOOKUP_CHUNK_ROWS: Final = 16_384
"""Values a `BinLookup` places at a time: their positions and cells (256 KiB) stay in cache.

Whole-batch temporaries cost more than the look-ups: 31 look-ups of 62,500 values took
14.6 ms that way against 6.0 ms in chunks (measured here, caches cold as between batches).
"""


class BinLookup:
    """Find bins like `bin_index`, and cells of a fine grid with tails, by a lookup table.

    `numpy.searchsorted` took about 2.5 ms per 65,536 values on 21 edges here, once per
    chart and batch. A table of equal-width cells over the edges' range gives each value
    its count of edges at or below it in O(1) wherever the count is the same in the value's
    cell and both neighbours (so a value put one cell off by rounding still gets it right);
    values in the few cells at an edge, and values outside the range, NaN or infinite, go to
    `numpy.searchsorted`. The answers are exactly those of `bin_index`, and for `fine` those of
    ``searchsorted(edges, values, "right")`` with a value on the last edge in the last bin.

    Parameters
    ----------
    edges : ndarray of shape (n_edges,)
        Increasing bin edges (as `quantile_edges` returns, or a fine grid).
    cells_per_edge : int, default=512
        Cells of the lookup table per edge (1,024 to `MAX_LOOKUP_CELLS`): about
        ``3 / cells_per_edge`` of the values of an even spread then need `numpy.searchsorted`.
    """

    def __init__(self, edges: FloatArray, *, cells_per_edge: int = 512) -> None:
        self.edges = np.asarray(edges, dtype=np.float64)
        self.cells_per_edge = cells_per_edge
        cells = min(max(1024, cells_per_edge * self.edges.size), MAX_LOOKUP_CELLS)
        self.low = float(self.edges[0])
        span = float(self.edges[-1]) - self.low
        self.scale = cells / span if span > 0 and np.isfinite(span) else 0.0
        self.cells = cells
        self._strided: dict[int, IntArray] = {}
        if self.scale:
            starts = self.low + np.arange(cells + 1) / self.scale
            counts = np.searchsorted(self.edges, starts, side="right")
            changes = np.flatnonzero(counts[:-1] != counts[1:])
            table = counts[:-1].astype(np.int64)
            for shift in (-1, 0, 1):
                table[np.clip(changes + shift, 0, cells - 1)] = _UNCERTAIN
            table[[0, cells - 1]] = _UNCERTAIN  # values clipped into the end cells
            self.table = table
            last_bin = max(self.edges.size - 2, 0)
            # the same table answering `index` directly: one subtraction and clip fewer per value
            self.bin_table = np.where(
                table == _UNCERTAIN, _UNCERTAIN, np.clip(table - 1, 0, last_bin)
            )

    def __reduce__(self) -> tuple[Any, tuple[FloatArray, int]]:
        """Pickle the edges only; the table is rebuilt from them.

        A cluster ships accumulators that hold lookups: the tables were 0.7 MB of a report's
        diagnostics accumulator of 1.4 MB (measured here), their edges a few kilobytes.
        """
        return _rebuild_lookup, (self.edges, self.cells_per_edge)

    def _look_up(self, values: FloatArray, table: IntArray) -> tuple[IntArray, IntArray]:
        """Return the `table` entry of each value's cell, and where it is `_UNCERTAIN`.

        `LOOKUP_CHUNK_ROWS` values at a time, so each value's position and cell stay in
        cache until `np.take` reads them; cells past either end are read as the end cells
        (`np.take` clips), whose entries are `_UNCERTAIN`.
        """
        n = values.size
        found = np.empty(n, dtype=np.int64)
        position = np.empty(min(n, LOOKUP_CHUNK_ROWS))
        cell = np.empty(position.size, dtype=np.int64)
        offset = self.low * self.scale
        for start in range(0, n, LOOKUP_CHUNK_ROWS):
            stop = min(start + LOOKUP_CHUNK_ROWS, n)
            here, cells = position[: stop - start], cell[: stop - start]
            np.multiply(values[start:stop], self.scale, out=here)
            here -= offset
            with np.errstate(invalid="ignore"):  # NaN or inf cast to an integer: sorted out below
                np.copyto(cells, here, casting="unsafe")
            np.take(table, cells, out=found[start:stop], mode="clip")
        return found, np.flatnonzero(found == _UNCERTAIN)

    def _edges_at_or_below(self, values: FloatArray) -> tuple[IntArray, IntArray]:
        """Return ``searchsorted(edges, values, "right")`` and where the table was not used."""
        if not self.scale:
            return np.searchsorted(self.edges, values, side="right"), np.arange(values.size)
        count, exact = self._look_up(values, self.table)
        count[exact] = np.searchsorted(self.edges, values[exact], side="right")
        return count, exact

    def index_and_exact(self, values: FloatArray, *, stride: int = 1) -> tuple[IntArray, IntArray]:
        """Return the bin of each value (as `index`) and where `numpy.searchsorted` found it.

        Every value below the first edge or above the last, NaN and infinities included, is
        among the values found by `numpy.searchsorted`, so their extremes are the extremes
        of all the values wherever those lie outside the edges. With `stride`, the bins come
        multiplied by it, from a table that holds them so (no pass over the values to scale
        them): the first of each bin's `stride` cells in a flat array of cells per bin.
        """
        last_bin = max(self.edges.size - 2, 0)
        if not self.scale:
            bins = np.searchsorted(self.edges, values, side="right") - 1
            np.clip(bins, 0, last_bin, out=bins)
            bins *= stride
            return bins, np.arange(values.size)
        bins, exact = self._look_up(values, self._bin_table(stride))
        found = np.searchsorted(self.edges, values[exact], side="right") - 1
        np.clip(found, 0, last_bin, out=found)
        found *= stride
        bins[exact] = found
        return bins, exact

    def _bin_table(self, stride: int) -> IntArray:
        """Return `bin_table` with every bin multiplied by `stride` (made once per stride)."""
        if stride not in self._strided:
            certain = self.bin_table != _UNCERTAIN
            self._strided[stride] = np.where(certain, self.bin_table * stride, _UNCERTAIN)
        return self._strided[stride]

    def index(self, values: FloatArray) -> IntArray:
        """Bin of each value, equal to ``bin_index(edges, values)``."""
        return self.index_and_exact(values)[0]

    def fine(self, values: FloatArray) -> IntArray:
        """Cell of each value on a fine grid with tails (see the module docstring).

        0 below the grid, ``k + 1`` in bin ``k``, ``len(edges)`` above the grid.
        """
        count, exact = self._edges_at_or_below(values)
        # a value on the last edge is in the last bin, not above the grid; such a value
        # is in an end cell, so among the exact ones
        on_last = exact[values[exact] == self.edges[-1]]
        count[on_last] = self.edges.size - 1
        return count


PackedCounts = tuple[str, tuple[int, ...], bytes]
"""Counts as `pack_counts` pickles them: numpy type, shape and compressed bytes."""


def pack_counts(counts: IntArray) -> PackedCounts:
    """Pack non-negative counts small: the smallest unsigned type that holds them, compressed.

    For pickling: a cluster ships each part's accumulators, whose fine histograms are int64
    but mostly small counts and zeros. A report's charts made 0.92 MB of a part's 0.97 MB at
    14 coefficients; packed, 0.10 of 0.12 MB (measured here). `unpack_counts` restores them.
    """
    top = int(counts.max()) if counts.size else 0
    small = next((t for t in (np.uint8, np.uint16, np.uint32) if top <= np.iinfo(t).max), np.uint64)
    data = np.ascontiguousarray(counts, dtype=small)
    return np.dtype(small).str, data.shape, zlib.compress(data.tobytes(), 1)


def unpack_counts(packed: PackedCounts) -> IntArray:
    """Return the int64 counts `pack_counts` packed."""
    dtype, shape, data = packed
    return np.frombuffer(zlib.decompress(data), dtype=dtype).reshape(shape).astype(np.int64)


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


def _rebuild_lookup(edges: FloatArray, cells_per_edge: int) -> BinLookup:
    """Build a `BinLookup` again from what `BinLookup.__reduce__` pickled."""
    return BinLookup(edges, cells_per_edge=cells_per_edge)
