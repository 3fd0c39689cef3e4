"""Pass 2: residual diagnostics of a finished fit, streamed over design batches and mergeable.

Everything here is computed from the fit of pass 1 and one more pass over the same rows:
per-row values (fitted, residual, leverage, studentized residuals, Cook's distance), a residual
histogram and quantiles, residuals binned by fitted value and by each numeric predictor, exact
worst-row lists, residual summaries per segment, Breusch–Pagan, RESET, Jarque–Bera and
Durbin–Watson, HC0–HC3 standard errors, and plain-word flags.

Weighted fits. Every residual summary (histogram, quantiles, bins, segments, tests, rankings)
uses the weighted residual ``√w·e``, the scale on which the model assumes equal spread; for an
unweighted fit it is the residual itself. Leverage and the studentized residuals are those of
the whitened regression ``√w·y`` on ``√w·X``; the robust covariances use ``√w·x`` rows and
``√w·e``, as statsmodels' WLS results do. Breusch–Pagan regresses ``(√w·e)²`` on the unscaled
design with a constant (the scaled design has no constant column, and an R² without one does
not measure a dependence); RESET refits with the weights.

Flags are aids to judgement: each names its rule, and none is proof of an error.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Final

import numpy as np
import polars as pl
from numpy.typing import ArrayLike, NDArray

from triage._typing import CRITERIA, Criterion
from triage.core.binning import (
    BinLookup,
    quantile_edges,
    quantiles_from_counts,
)
from triage.core.distributions import norm_sf
from triage.core.moments import StreamMoments, pool_groups
from triage.core.residual_tests import (
    BreuschPaganAccumulator,
    DurbinWatsonAccumulator,
    ResetAccumulator,
    jarque_bera,
)
from triage.core.worst_rows import TopRows
from triage.errors import SpecError
from triage.results.diagnostics import (
    Diagnostics,
    Flag,
    ResidualBin,
    ResidualHistogram,
    ResidualTest,
    RobustStdErrors,
    RowDiagnostics,
    SegmentLevel,
    ThresholdCounts,
    WorstRow,
)

if TYPE_CHECKING:
    from triage.core.design import DesignBatch
    from triage.core.lsq import LinearFit

__all__ = [
    "DiagnosticsAccumulator",
    "DiagnosticsConfig",
    "default_config",
    "row_diagnostics",
]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

LEVERAGE_ONE_TOLERANCE: Final = 1e-10
"""A row with ``1 - h <= LEVERAGE_ONE_TOLERANCE`` counts as having leverage 1.

Such a row fixes its own fitted value (up to rounding its residual is 0), so its studentized
residuals and Cook's distance are NaN, and it adds nothing to the HC2/HC3 meat.
"""
HIST_HALF_WIDTH: Final = 4.0
"""The default residual histogram spans ± this many residual SDs..."""
HIST_BINS: Final = 40
"""...in this many bins; values outside are counted as tails."""
FINE_HALF_WIDTH: Final = 8.0
"""The fine grid for quantiles spans ± this many residual SDs..."""
FINE_BINS: Final = 400
"""...in this many bins (0.04 SD each), plus two tail cells."""
FITTED_BINS: Final = 20
"""Bins of fitted values for the residual-versus-fitted summary (quantiles of the sample)."""
PREDICTOR_BINS: Final = 20
"""Bins per numeric predictor (quantiles of the sample)."""
SEGMENT_BINS: Final = 10
"""Bins for a numeric segment column with more distinct sample values than this."""
RESID_QUANTILES: Final = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)
"""Probabilities of the reported residual quantiles."""
OTHER_LEVEL: Final = "(other)"
"""Segment level pooling the levels seen after `max_segment_levels` distinct ones."""
MISSING_LEVEL: Final = "(missing)"
"""Segment level of rows whose segment value is null (or NaN for a numeric column)."""
STUDENTIZED_LIMIT: Final = 3.0
"""Rows with an externally studentized residual beyond ± this are counted (common practice)."""
FLAG_P_VALUE: Final = 0.01
"""Tests with a p-value below this raise a flag."""
DURBIN_WATSON_RANGE: Final = (1.5, 2.5)
"""Durbin–Watson values outside this range raise a flag for ordered rows (common practice)."""
TREND_R2: Final = 0.95
"""R² above this on ordered rows raises a shared-trend flag (common practice)."""
ROWS_PER_TERM: Final = 10
"""Fewer rows than this per coefficient raises an overfitting flag (common practice)."""

_WORST_FIELDS: Final = ("fitted", "resid", "weighted_resid", "studentized", "leverage", "cooks")
_BIN_QUANTILES: Final = (0.1, 0.5, 0.9)


# --------------------------------------------------------------------------- per-row values


def _rank(fit: LinearFit) -> int:
    """Return the number of estimated (not aliased) coefficients."""
    return len(fit.names) - len(fit.aliased)


def _row_values(
    fit: LinearFit,
    shifted: FloatArray,
    y: FloatArray,
    weights: FloatArray | None,
    rows: IntArray,
) -> RowDiagnostics:
    """Per-row diagnostics from design rows passed through `LinearFit.to_shifted`."""
    fitted = fit.predict_shifted(shifted)
    resid = y - fitted
    weighted = resid if weights is None else np.sqrt(weights) * resid
    h = fit.leverage_shifted(shifted, weights)
    one_minus_h = 1.0 - h
    s = fit.resid_sd
    df = fit.df_resid
    internal = np.full(h.size, np.nan)
    external = np.full(h.size, np.nan)
    cooks = np.full(h.size, np.nan)
    if s > 0.0 and math.isfinite(s):
        # Whole-array arithmetic with NaN where h is 1 (no residual left to studentize): the
        # NaN carries through (1.7x faster here than indexing usable rows out and back in).
        with np.errstate(divide="ignore", invalid="ignore"):
            root = np.sqrt(np.where(one_minus_h > LEVERAGE_ONE_TOLERANCE, one_minus_h, np.nan))
            internal = weighted / (s * root)
            cooks = internal * internal * h / (_rank(fit) * one_minus_h)
            if df > 1:
                loo_var = (fit.rss - weighted * weighted / one_minus_h) / (df - 1)
                external = np.where(loo_var > 0.0, weighted / (np.sqrt(loo_var) * root), np.nan)
    return RowDiagnostics(
        rows=rows,
        fitted=fitted,
        resid=resid,
        weighted_resid=weighted,
        leverage=h,
        student_internal=internal,
        studentized=external,
        cooks=cooks,
        in_fit=np.ones(h.size, dtype=np.bool_),
    )


def row_diagnostics(
    fit: LinearFit, batch: DesignBatch, in_fit: NDArray[np.bool_] | None = None
) -> RowDiagnostics:
    """Compute fitted values, residuals, leverage, studentized residuals and Cook's distance.

    Parameters
    ----------
    fit : LinearFit
        The fit of pass 1.
    batch : DesignBatch
        Design rows built by the same builder as the fit's.
    in_fit : ndarray of bool, optional
        Per row of the batch, True when the row was among the fit's rows; rows outside are
        scored as new observations (see `RowDiagnostics`). By default every row is in.

    Returns
    -------
    RowDiagnostics
        One value per row of the batch.

    See Also
    --------
    DiagnosticsAccumulator : the same values summarised over a whole pass.
    """
    values = _row_values(fit, fit.to_shifted(batch.x), batch.y, batch.weights, batch.rows)
    if in_fit is None or bool(np.all(in_fit)):
        return values
    outside = ~np.asarray(in_fit, dtype=np.bool_)
    h0 = values.leverage[outside]
    s = fit.resid_sd
    with np.errstate(divide="ignore", invalid="ignore"):
        predicted = values.weighted_resid[outside] / (s * np.sqrt(1.0 + h0))
    if not (s > 0.0 and math.isfinite(s)):
        predicted = np.full(h0.size, np.nan)
    internal, external, cooks = (
        values.student_internal.copy(),
        values.studentized.copy(),
        values.cooks.copy(),
    )
    internal[outside] = predicted
    external[outside] = predicted
    cooks[outside] = np.nan
    return replace(
        values,
        student_internal=internal,
        studentized=external,
        cooks=cooks,
        in_fit=~outside,
    )


# --------------------------------------------------------------------------- configuration


def _check_edges(name: str, edges: FloatArray) -> None:
    """Raise `SpecError` unless `edges` are at least two finite, non-decreasing values."""
    if edges.ndim != 1 or edges.size < 2 or not np.all(np.isfinite(edges)):
        msg = f"`{name}` must hold at least two finite bin edges, got {edges.size} values"
        raise SpecError(msg)
    if np.any(np.diff(edges) < 0.0):
        msg = f"`{name}` must be sorted ascending; sort the edges or use `default_config`"
        raise SpecError(msg)


@dataclass(frozen=True, eq=False)
class DiagnosticsConfig:
    """What pass 2 summarises and how; build it with `default_config` after pass 1.

    Attributes
    ----------
    hist_edges : ndarray
        Edges of the residual histogram (residuals outside count as tails).
    fine_edges : ndarray
        Fine residual grid for quantiles, overall and per bin.
    binned_edges : mapping of str to ndarray
        Bin edges per binned variable: ``"fitted"`` for fitted values and one entry per
        numeric predictor (a source column in the batch's frame). Values outside the edges
        go to the end bins.
    fitted_center, fitted_scale : float
        Standardisation of fitted values for RESET (from the sample); center 0 without an
        intercept.
    segment_columns : tuple of str
        Source columns to summarise residuals by.
    segment_cuts : mapping of str to ndarray
        Interior cut points of numeric segment columns; the others are taken level by level.
    top_k : int
        Rows kept per worst-row criterion.
    max_segment_levels : int
        Distinct levels kept per segment column. Levels first seen after that many are pooled
        into ``"(other)"``, and the column is listed in `Diagnostics.segments_capped`. Pooling
        keeps the pass going on a column with very many levels (an id, say) instead of failing
        after a long read. A merged pass and a single stream agree exactly as long as no part
        alone exceeds the cap.
    is_ordered : bool
        Whether row order means something (time order): enables the Durbin–Watson and
        shared-trend flags. Durbin–Watson itself is always computed.
    """

    hist_edges: FloatArray
    fine_edges: FloatArray
    binned_edges: Mapping[str, FloatArray]
    fitted_center: float
    fitted_scale: float
    segment_columns: tuple[str, ...] = ()
    segment_cuts: Mapping[str, FloatArray] = field(default_factory=dict)
    top_k: int = 20
    max_segment_levels: int = 200
    is_ordered: bool = False

    def __post_init__(self) -> None:
        _check_edges("hist_edges", self.hist_edges)
        _check_edges("fine_edges", self.fine_edges)
        for name, edges in self.binned_edges.items():
            _check_edges(f"binned_edges[{name!r}]", edges)
        if self.top_k < 0:
            msg = f"`top_k` must be a non-negative integer, got `{self.top_k}`"
            raise SpecError(msg)
        if self.max_segment_levels < 1:
            msg = (
                f"`max_segment_levels` must be a positive integer, got `{self.max_segment_levels}`"
            )
            raise SpecError(msg)
        if not (self.fitted_scale > 0.0 and math.isfinite(self.fitted_scale)):
            msg = f"`fitted_scale` must be positive and finite, got `{self.fitted_scale}`"
            raise SpecError(msg)
        unknown = sorted(set(self.segment_cuts) - set(self.segment_columns))
        if unknown:
            msg = (
                f"`segment_cuts` names columns not in `segment_columns`: `{'`, `'.join(unknown)}`;"
                " add them to `segment_columns` or drop their cuts"
            )
            raise SpecError(msg)


def _is_numeric_segment(sample: pl.Series, *, is_categorical: bool) -> bool:
    """Whether a segment column is cut into quantile bins rather than taken level by level."""
    if is_categorical or not sample.dtype.is_numeric():
        return False
    return sample.drop_nulls().drop_nans().n_unique() > SEGMENT_BINS


def default_config(
    fit: LinearFit,
    sample_fitted: ArrayLike,
    sample_predictors: Mapping[str, ArrayLike],
    segment_columns: Collection[str] = (),
    sample_segments: Mapping[str, pl.Series] | None = None,
    *,
    categorical: Collection[str] = (),
    top_k: int = 20,
    max_segment_levels: int = 200,
    is_ordered: bool = False,
) -> DiagnosticsConfig:
    """Choose histogram, grid and bin edges from the fit and an in-memory sample.

    Parameters
    ----------
    fit : LinearFit
        The fit of pass 1; its residual SD scales the histogram and the fine grid (1 is used
        when it is 0, an exact fit).
    sample_fitted : array_like of shape (n_sample,)
        Fitted values on the sample: ~20 quantile bins, and the RESET standardisation.
    sample_predictors : mapping of str to array_like
        Numeric predictor columns on the sample: ~20 quantile bins each.
    segment_columns : collection of str, default=()
        Columns to summarise residuals by.
    sample_segments : mapping of str to polars.Series, optional
        Those columns on the sample. A numeric column (not listed in `categorical`) with more
        than `SEGMENT_BINS` distinct values is cut at ~10 sample quantiles; any other column
        is taken level by level. Required when `segment_columns` is not empty.
    categorical : collection of str, default=()
        Segment columns to take level by level even if numeric.
    top_k : int, default=20
        Rows per worst-row list.
    max_segment_levels : int, default=200
        See `DiagnosticsConfig`.
    is_ordered : bool, default=False
        Whether row order is meaningful (time order).

    Returns
    -------
    DiagnosticsConfig

    Raises
    ------
    SpecError
        If a segment column has no sample values.
    DataError
        If a binned variable has no finite sample value.
    """
    s = fit.resid_sd if fit.resid_sd > 0.0 and math.isfinite(fit.resid_sd) else 1.0
    fitted = np.asarray(sample_fitted, dtype=np.float64)
    fitted = fitted[np.isfinite(fitted)]
    if fit.has_intercept:
        center = float(fitted.mean()) if fitted.size else 0.0
        spread = float(fitted.std()) if fitted.size else 0.0
    else:
        # Without an intercept only a pure scaling keeps the RESET span (see ResetAccumulator).
        center = 0.0
        spread = float(np.sqrt(np.mean(fitted * fitted))) if fitted.size else 0.0
    binned = {"fitted": quantile_edges(fitted, FITTED_BINS, name="fitted values")}
    for name, values in sample_predictors.items():
        binned[name] = quantile_edges(values, PREDICTOR_BINS, name=name)
    cuts: dict[str, FloatArray] = {}
    segments = tuple(segment_columns)
    for col in segments:
        if sample_segments is None or col not in sample_segments:
            msg = (
                f"segment column `{col}` has no sample values; pass it in `sample_segments` "
                "so its levels or cut points can be chosen"
            )
            raise SpecError(msg)
        series = sample_segments[col]
        if _is_numeric_segment(series, is_categorical=col in categorical):
            values = series.cast(pl.Float64).to_numpy()
            cuts[col] = quantile_edges(values, SEGMENT_BINS, name=col)[1:-1]
    return DiagnosticsConfig(
        hist_edges=np.linspace(-HIST_HALF_WIDTH * s, HIST_HALF_WIDTH * s, HIST_BINS + 1),
        fine_edges=np.linspace(-FINE_HALF_WIDTH * s, FINE_HALF_WIDTH * s, FINE_BINS + 1),
        binned_edges=binned,
        fitted_center=center,
        fitted_scale=spread if spread > 0.0 and math.isfinite(spread) else 1.0,
        segment_columns=segments,
        segment_cuts=cuts,
        top_k=top_k,
        max_segment_levels=max_segment_levels,
        is_ordered=is_ordered,
    )


# --------------------------------------------------------------------------- results


# --------------------------------------------------------------------------- accumulator parts


class _Binned:
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
        self.n_cells = fine_edges.size + 1
        self.counts = np.zeros((n_bins, self.n_cells), dtype=np.int64)
        self.sum_x = np.zeros(n_bins)
        self.sum_e = np.zeros(n_bins)
        self.min_e = np.full(n_bins, np.inf)
        self.max_e = np.full(n_bins, -np.inf)
        self.min_x = math.inf
        self.max_x = -math.inf

    def update(
        self, x: FloatArray, e: FloatArray, cell: IntArray, below: IntArray, above: IntArray
    ) -> None:
        """Add values `x` with residuals `e` in fine-grid cells `cell` (`BinLookup.fine`).

        `below` and `above` index the rows in the tail cells below and above the grid.
        """
        n_bins = self.counts.shape[0]
        b = self.lookup.index(x)
        flat = np.bincount(b * self.n_cells + cell, minlength=n_bins * self.n_cells)
        self.counts += flat.reshape(n_bins, self.n_cells)
        self.sum_x += np.bincount(b, weights=x, minlength=n_bins)
        self.sum_e += np.bincount(b, weights=e, minlength=n_bins)
        np.minimum.at(self.min_e, b[below], e[below])
        np.maximum.at(self.max_e, b[above], e[above])
        self.min_x = min(self.min_x, float(x.min()))
        self.max_x = max(self.max_x, float(x.max()))

    def merge(self, other: _Binned) -> None:
        self.counts += other.counts
        self.sum_x += other.sum_x
        self.sum_e += other.sum_e
        np.minimum(self.min_e, other.min_e, out=self.min_e)
        np.maximum(self.max_e, other.max_e, out=self.max_e)
        self.min_x = min(self.min_x, other.min_x)
        self.max_x = max(self.max_x, other.max_x)

    def finalize(self) -> tuple[ResidualBin, ...]:
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


class _Segments:
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
        labels = series.cast(pl.String).fill_null(MISSING_LEVEL)
        seen = labels.unique(maintain_order=True)
        for label in seen.filter(~seen.is_in(list(self.index))).to_list():
            self._target(label)
            if self.is_capped:
                break  # no room left: every later new level goes to the pooled one as well
        fallback = self.index.get(OTHER_LEVEL, -1)
        mapped = labels.replace_strict(self.index, default=fallback, return_dtype=pl.Int64)
        return mapped.to_numpy().astype(np.int64)

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
        codes = self._codes(series)
        self._absorb(codes, np.ones(e.size), e, np.zeros(e.size))

    def merge(self, other: _Segments) -> None:
        index = np.array([self._target(label) for label in other.labels], dtype=np.int64)
        self.is_capped = self.is_capped or other.is_capped
        self._absorb(index, other.count, other.mean, other.m2)

    def finalize(self) -> tuple[SegmentLevel, ...]:
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


# --------------------------------------------------------------------------- the accumulator


class DiagnosticsAccumulator:
    """Streaming, mergeable residual diagnostics of a finished fit (pass 2).

    Parameters
    ----------
    fit : LinearFit
        The fit of pass 1.
    config : DiagnosticsConfig
        What to summarise (see `default_config`).

    Notes
    -----
    Batches may come in any order and parts of a pass merge in any order (Durbin–Watson
    joins batches by the source position of their rows). Threshold counts for the
    flags are exact: the thresholds ``2p/n`` and ``4/n`` use the fit's row count, known
    after pass 1.

    Examples
    --------
    >>> acc = DiagnosticsAccumulator(fit, config)  # doctest: +SKIP
    >>> for batch in batches:  # doctest: +SKIP
    ...     acc.update(batch)
    >>> diagnostics = acc.finalize()  # doctest: +SKIP
    """

    def __init__(self, fit: LinearFit, config: DiagnosticsConfig) -> None:
        self.fit = fit
        self.config = config
        p = len(fit.names)
        rank = _rank(fit)
        self._n = 0
        self._moments = StreamMoments()
        self._dw = DurbinWatsonAccumulator()
        self._hist = np.zeros(config.hist_edges.size + 1, dtype=np.int64)
        self._fine = np.zeros(config.fine_edges.size + 1, dtype=np.int64)
        self._hist_lookup = BinLookup(config.hist_edges)
        self._fine_lookup = BinLookup(config.fine_edges)
        self._min = math.inf
        self._max = -math.inf
        self._binned = {
            name: _Binned(edges, config.fine_edges) for name, edges in config.binned_edges.items()
        }
        self._worst = {c: TopRows(config.top_k, _WORST_FIELDS) for c in CRITERIA}
        self._segments = {
            col: _Segments(col, config.segment_cuts.get(col), config.max_segment_levels)
            for col in config.segment_columns
        }
        self._bp = BreuschPaganAccumulator(p, has_intercept=fit.has_intercept)
        self._reset = ResetAccumulator(
            p,
            has_intercept=fit.has_intercept,
            center=config.fitted_center,
            scale=config.fitted_scale,
        )
        self._meat = np.zeros((3, rank, rank))
        self._leverage_threshold = 2.0 * rank / fit.n
        self._cooks_threshold = 4.0 / fit.n
        self._n_studentized = 0
        self._n_leverage = 0
        self._n_cooks = 0

    def _check_frame(self, batch: DesignBatch) -> None:
        """Raise `SpecError` if a binned predictor or segment column is not in the frame."""
        wanted = [c for c in self._binned if c != "fitted"] + list(self._segments)
        missing = [c for c in wanted if c not in batch.frame.columns]
        if missing:
            msg = (
                f"columns `{'`, `'.join(missing)}` are binned or segmented but not in the "
                f"batch's frame (columns: {', '.join(batch.frame.columns)}); read them with "
                "the model's columns"
            )
            raise SpecError(msg)

    def update(self, batch: DesignBatch) -> None:
        """Add the next batch of design rows (in file order).

        Raises
        ------
        SpecError
            If a binned predictor or segment column is missing from ``batch.frame``.
        """
        if batch.x.shape[0] == 0:
            return
        self._check_frame(batch)
        shifted = self.fit.to_shifted(batch.x)
        rd = _row_values(self.fit, shifted, batch.y, batch.weights, batch.rows)
        e = rd.weighted_resid
        self._n += e.size
        self._moments.update(e)
        self._dw.update(e, start=int(batch.rows[0]))
        self._hist += np.bincount(self._hist_lookup.fine(e), minlength=self._hist.size)
        cell = self._fine_lookup.fine(e)  # shared by every binned variable
        below = np.flatnonzero(cell == 0)
        above = np.flatnonzero(cell == self._fine.size - 1)
        self._fine += np.bincount(cell, minlength=self._fine.size)
        self._min = min(self._min, float(e.min()))
        self._max = max(self._max, float(e.max()))
        for name, binned in self._binned.items():
            x = rd.fitted if name == "fitted" else batch.frame[name].cast(pl.Float64).to_numpy()
            binned.update(x, e, cell, below, above)
        payload = {f: getattr(rd, f) for f in _WORST_FIELDS}
        scores: dict[Criterion, FloatArray] = {
            "abs_resid": np.abs(e),
            "studentized": np.abs(rd.studentized),
            "leverage": rd.leverage,
            "cooks": rd.cooks,
        }
        for criterion, top in self._worst.items():
            top.update(scores[criterion], rd.rows, payload)
        for col, seg in self._segments.items():
            seg.update(batch.frame[col], e)
        self._bp.update(batch.x, e)
        self._reset.update(batch.x, batch.y, rd.fitted, batch.weights)
        self._update_meat(shifted, batch.weights, rd)
        with np.errstate(invalid="ignore"):
            self._n_studentized += int(np.sum(np.abs(rd.studentized) > STUDENTIZED_LIMIT))
            self._n_leverage += int(np.sum(rd.leverage > self._leverage_threshold))
            self._n_cooks += int(np.sum(rd.cooks > self._cooks_threshold))

    def _update_meat(
        self, shifted: FloatArray, weights: FloatArray | None, rd: RowDiagnostics
    ) -> None:
        """Add ``Σ x~ x~' e² ω`` for HC0 (ω = 1), HC2 (1/(1-h)) and HC3 (1/(1-h)²).

        Each as ``B'B`` with ``B = x~ |e| sqrt(ω)``, which numpy hands to a symmetric
        rank-k update: half the work of the general product.
        """
        root = np.abs(rd.weighted_resid)
        if weights is not None:
            root *= np.sqrt(weights)
        one_minus_h = 1.0 - rd.leverage
        ok = one_minus_h > LEVERAGE_ONE_TOLERANCE
        root_hc3 = np.divide(root, one_minus_h, out=np.zeros_like(root), where=ok)
        root_hc2 = np.sqrt(root * root_hc3)  # |e| / sqrt(1 - h), 0 where h is 1
        block = np.empty_like(shifted)
        for j, u in enumerate((root, root_hc2, root_hc3)):
            np.multiply(shifted, u[:, np.newaxis], out=block)
            self._meat[j] += block.T @ block

    def merge(self, other: DiagnosticsAccumulator) -> DiagnosticsAccumulator:
        """Fold in an accumulator over other rows of the same fit and config; returns self.

        The rows may come from anywhere in the file: Durbin–Watson joins batches by
        position. Which levels of a segment column past its level cap get rows of their own
        depends on the order the levels were met in.

        Raises
        ------
        SpecError
            If `other` was built for another fit or config.
        """
        same_fit = other.fit.names == self.fit.names and np.array_equal(
            other.fit.coef, self.fit.coef, equal_nan=True
        )
        same_config = (
            other.config.segment_columns == self.config.segment_columns
            and other.config.top_k == self.config.top_k
            and other.config.binned_edges.keys() == self.config.binned_edges.keys()
            and np.array_equal(other.config.fine_edges, self.config.fine_edges)
            and np.array_equal(other.config.hist_edges, self.config.hist_edges)
        )
        if not (same_fit and same_config):
            msg = (
                "cannot merge diagnostics built for a different fit or configuration; build "
                "every part from the same `fit` and `config`"
            )
            raise SpecError(msg)
        self._n += other._n
        self._moments.merge(other._moments)
        self._dw.merge(other._dw)
        self._hist += other._hist
        self._fine += other._fine
        self._min = min(self._min, other._min)
        self._max = max(self._max, other._max)
        for name, binned in self._binned.items():
            binned.merge(other._binned[name])
        for criterion, top in self._worst.items():
            top.merge(other._worst[criterion])
        for col, seg in self._segments.items():
            seg.merge(other._segments[col])
        self._bp.merge(other._bp)
        self._reset.merge(other._reset)
        self._meat += other._meat
        self._n_studentized += other._n_studentized
        self._n_leverage += other._n_leverage
        self._n_cooks += other._n_cooks
        return self

    def _histogram(self) -> ResidualHistogram:
        empty = self._n == 0
        return ResidualHistogram(
            edges=self.config.hist_edges,
            counts=self._hist[1:-1].copy(),
            below=int(self._hist[0]),
            above=int(self._hist[-1]),
            minimum=math.nan if empty else self._min,
            maximum=math.nan if empty else self._max,
            quantiles=dict(
                zip(
                    RESID_QUANTILES,
                    quantiles_from_counts(
                        self._fine, self.config.fine_edges, self._min, self._max, RESID_QUANTILES
                    ),
                    strict=True,
                )
            ),
        )

    def _robust_se(self) -> dict[str, RobustStdErrors]:
        fit = self.fit
        dof_ratio = self._n / fit.df_resid if fit.df_resid > 0 else math.nan
        se = [np.sqrt(np.diag(fit.sandwich(m))) for m in self._meat]
        return {
            name: RobustStdErrors(
                hc0=float(se[0][j]),
                hc1=float(se[0][j] * math.sqrt(dof_ratio)),
                hc2=float(se[1][j]),
                hc3=float(se[2][j]),
            )
            for j, name in enumerate(fit.names)
        }

    def finalize(self) -> Diagnostics:
        """Turn the sums into results; the accumulator can keep taking batches afterwards."""
        worst = {
            criterion: tuple(
                WorstRow(
                    row=int(top.rows[i]),
                    fitted=float(top.payload["fitted"][i]),
                    resid=float(top.payload["resid"][i]),
                    weighted_resid=float(top.payload["weighted_resid"][i]),
                    studentized=float(top.payload["studentized"][i]),
                    leverage=float(top.payload["leverage"][i]),
                    cooks=float(top.payload["cooks"][i]),
                )
                for i in range(top.rows.size)
            )
            for criterion, top in self._worst.items()
        }
        tests = {
            "breusch_pagan": self._bp.finalize(),
            "reset": self._reset.finalize(),
            "jarque_bera": jarque_bera(self._moments),
            "durbin_watson": self._dw.finalize(),
        }
        counts = ThresholdCounts(
            studentized=self._n_studentized,
            leverage=self._n_leverage,
            leverage_threshold=self._leverage_threshold,
            cooks=self._n_cooks,
            cooks_threshold=self._cooks_threshold,
        )
        return Diagnostics(
            n=self._n,
            histogram=self._histogram(),
            binned={name: b.finalize() for name, b in self._binned.items()},
            worst=worst,
            segments={col: seg.finalize() for col, seg in self._segments.items()},
            segments_capped=tuple(c for c, seg in self._segments.items() if seg.is_capped),
            tests=tests,
            robust_se=self._robust_se() if self._n else {},
            counts=counts,
            resid_skewness=self._moments.skewness(),
            resid_kurtosis=self._moments.kurtosis(),
            flags=_flags(self.fit, self.config, self._n, counts, tests, self._moments),
        )


# --------------------------------------------------------------------------- flags


def _flags(
    fit: LinearFit,
    config: DiagnosticsConfig,
    n: int,
    counts: ThresholdCounts,
    tests: dict[str, ResidualTest],
    moments: StreamMoments,
) -> tuple[Flag, ...]:
    """Plain-word hints, each naming its rule; aids to judgement, not verdicts."""
    flags: list[Flag] = []
    if counts.studentized:
        # Two-sided normal tail beyond 3: what chance alone would give with normal errors.
        expected = n * 2.0 * norm_sf(STUDENTIZED_LIMIT)
        flags.append(
            Flag(
                "large-studentized",
                f"{counts.studentized:,} rows have a studentized residual beyond ±3 (a common "
                f"practice threshold; about {expected:,.1f} would be expected by chance with "
                "normal errors). Worth a look: they may be data errors or cases the model "
                "does not cover, though this is no proof of error.",
            )
        )
    if counts.leverage:
        flags.append(
            Flag(
                "high-leverage",
                f"{counts.leverage:,} rows have leverage above 2p/n = "
                f"{counts.leverage_threshold:.3g} (common practice): their predictor values "
                "are unusual and may pull the fit towards them. Worth a look.",
            )
        )
    if counts.cooks:
        flags.append(
            Flag(
                "influential-rows",
                f"{counts.cooks:,} rows have Cook's distance above 4/n = "
                f"{counts.cooks_threshold:.3g} (common practice): leaving one out may move "
                "the coefficients noticeably. Worth a look, no proof of error.",
            )
        )
    bp, reset, jb, dw = (
        tests["breusch_pagan"],
        tests["reset"],
        tests["jarque_bera"],
        tests["durbin_watson"],
    )
    if bp.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "spread-changes",
                f"Breusch–Pagan (Koenker) p = {bp.p_value:.2g} < 0.01: the spread of the "
                "residuals may change with the predictors, so the usual standard errors may "
                "mislead; consider the robust (HC3) ones.",
            )
        )
    if reset.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "curvature",
                f"RESET p = {reset.p_value:.2g} < 0.01: powers of the fitted values still "
                "explain the target, so the model may miss curvature or a term (a transform "
                "or an interaction may help).",
            )
        )
    if jb.p_value < FLAG_P_VALUE:
        flags.append(
            Flag(
                "tails",
                f"Jarque–Bera p = {jb.p_value:.2g} < 0.01 (skewness "
                f"{moments.skewness():.2f}, kurtosis {moments.kurtosis():.2f}; normal: 0 "
                "and 3): the residuals may have heavy tails or skew, so intervals that "
                "assume normal errors may be off. With many rows this reacts to small "
                "departures.",
            )
        )
    low, high = DURBIN_WATSON_RANGE
    if config.is_ordered and not (low <= dw.statistic <= high) and math.isfinite(dw.statistic):
        flags.append(
            Flag(
                "serial-correlation",
                f"Durbin–Watson = {dw.statistic:.2f}, outside 1.5–2.5 (common practice) on "
                "ordered rows: neighbouring residuals may be correlated, which makes the "
                "standard errors look smaller than they are.",
            )
        )
    if config.is_ordered and fit.r2 > TREND_R2:
        flags.append(
            Flag(
                "shared-trend",
                f"R² = {fit.r2:.3f} on rows in time order (above 0.95, common practice): a "
                "trend shared by the target and the predictors may inflate the fit; worth "
                "checking with differences or a time term.",
            )
        )
    rank = _rank(fit)
    if rank * ROWS_PER_TERM > fit.n:
        flags.append(
            Flag(
                "many-terms",
                f"{rank} coefficients for {fit.n:,} rows (fewer than 10 rows per coefficient, "
                "common practice): the model may be overfitting; compare with fewer terms.",
            )
        )
    return tuple(flags)
