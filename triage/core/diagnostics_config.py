"""What pass 2 summarises: histogram and fine-grid edges, bins, segment columns, worst-row count."""

from __future__ import annotations

import math
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Final

import numpy as np
import polars as pl
from numpy.typing import ArrayLike, NDArray

from triage.core.binning import quantile_edges
from triage.errors import SpecError

if TYPE_CHECKING:
    from triage.core.lsq import LinearFit

__all__ = ["DiagnosticsConfig", "default_config"]

FloatArray = NDArray[np.float64]

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
    fit_condition : float
        The fit's `LinearFit.shifted_condition_number` (NaN: not known). Up to
        `residual_tests.TESTS_FROM_FIT_MAX_CONDITION`, Breusch–Pagan (for a fit without
        weights) and RESET are computed from the fit and the added columns' cross-products.
    exact_tests : bool
        Factor the auxiliary regressions of Breusch–Pagan and RESET from their own rows
        whatever `fit_condition` says (after RESET from the fit raised `UncertifiedGram`).
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
    fit_condition: float = math.nan
    exact_tests: bool = False

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
        fit_condition=fit.shifted_condition_number,
    )
