"""What pass 2 found: per-row values, residual summaries, tests, robust errors and flags.

`triage.core.diagnostics` computes these; the views turn them into text, JSON and charts.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Literal, TypeAlias

import numpy as np
from numpy.typing import ArrayLike, NDArray

from triage._typing import Criterion

__all__ = [
    "Diagnostics",
    "Flag",
    "FlagCode",
    "ResidualBin",
    "ResidualHistogram",
    "ResidualTest",
    "RobustStdErrors",
    "RowDiagnostics",
    "SegmentLevel",
    "ThresholdCounts",
    "WorstRow",
]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


@dataclass(frozen=True, eq=False)
class RowDiagnostics:
    """Per-row diagnostics of design rows under a fit.

    Attributes
    ----------
    rows : ndarray of shape (n,)
        Row positions in the source.
    fitted : ndarray of shape (n,)
        Fitted values.
    resid : ndarray of shape (n,)
        ``y - fitted``.
    weighted_resid : ndarray of shape (n,)
        ``√w·(y - fitted)``; the same array as `resid` for an unweighted fit.
    leverage : ndarray of shape (n,)
        Hat values of the (whitened) design.
    student_internal : ndarray of shape (n,)
        ``weighted_resid / (s √(1 - h))`` with ``s`` the fit's residual SD.
    studentized : ndarray of shape (n,)
        Externally studentized: as above with the leave-one-out SD
        ``s_(i)² = (RSS - e_i²/(1 - h_i)) / (df_resid - 1)``.
    cooks : ndarray of shape (n,)
        Cook's distance ``student_internal² h / (p (1 - h))``, ``p`` the rank of the design.
    in_fit : ndarray of bool, shape (n,)
        True where the row was one of the rows the fit was computed on.

    Notes
    -----
    Studentized values and Cook's distance are NaN where ``h`` is 1 (see
    `LEVERAGE_ONE_TOLERANCE`), where the fit has no residual spread, and (external only) where
    fewer than 2 residual degrees of freedom are left.

    A row outside the fit (filtered out, left out by a mark, not in the sample) is scored as
    a new observation: `leverage` is ``h0 = x0ᵀ(XᵀX)⁻¹x0`` (times its weight), computed as
    ``‖R⁻ᵀx0‖²`` like the hat values, and both studentized columns hold the standardised
    prediction residual ``√w·e0 / (s √(1 + h0))``, whose variance under the model is
    ``σ²(1 + h0)`` since the row did not pull the fit. Cook's distance measures how a row
    moves the fit it is part of, so it is NaN there.
    """

    rows: IntArray
    fitted: FloatArray
    resid: FloatArray
    weighted_resid: FloatArray
    leverage: FloatArray
    student_internal: FloatArray
    studentized: FloatArray
    cooks: FloatArray
    in_fit: NDArray[np.bool_]

    def take(self, indices: ArrayLike) -> RowDiagnostics:
        """Return the diagnostics of the rows at `indices` (indices into these arrays)."""
        picked = np.asarray(indices, dtype=np.intp)
        return RowDiagnostics(**{f.name: getattr(self, f.name)[picked] for f in fields(self)})


@dataclass(frozen=True, eq=False)
class ResidualHistogram:
    """Counts of weighted residuals on `edges`, tails, extremes and quantiles."""

    edges: FloatArray
    """Bin edges; bin k is ``[edges[k], edges[k + 1])``, the last one closed."""
    counts: IntArray
    """Residuals per bin."""
    below: int
    """Residuals below the first edge."""
    above: int
    """Residuals above the last edge."""
    minimum: float
    """Smallest residual (NaN when empty)."""
    maximum: float
    """Largest residual (NaN when empty)."""
    quantiles: dict[float, float]
    """Probability -> quantile from the fine grid, within one fine bin of the exact value
    inside ±8 SD (rough beyond: see `triage.core.binning`)."""
    fine_edges: FloatArray
    """Edges of the fine grid (±8 SD in 400 bins)."""
    fine_counts: IntArray
    """Residuals per fine bin, with the rows below and above the grid first and last
    (``fine_edges.size + 1`` cells); a chart re-bins them on a robust scale."""


@dataclass(frozen=True)
class ResidualBin:
    """Residuals of the rows whose binned variable falls in ``[lo, hi)``."""

    lo: float
    """Lower edge (the smallest value seen, if below the first edge, for the first bin)."""
    hi: float
    """Upper edge (the largest value seen, if above the last edge, for the last bin)."""
    n: int
    """Rows in the bin."""
    x_mean: float
    """Mean of the binned variable in the bin (NaN when empty)."""
    mean_resid: float
    """Mean weighted residual (NaN when empty)."""
    q10: float
    """10% quantile of the weighted residuals, from the fine grid."""
    q50: float
    """Median."""
    q90: float
    """90% quantile."""


@dataclass(frozen=True)
class WorstRow:
    """One row of a worst-rows list."""

    row: int
    """Position in the source."""
    fitted: float
    resid: float
    """``y - fitted``."""
    weighted_resid: float
    """``√w·(y - fitted)``; the ranking value of ``abs_resid`` (equal to `resid` unweighted)."""
    studentized: float
    """Externally studentized residual."""
    leverage: float
    cooks: float
    """Cook's distance."""


@dataclass(frozen=True)
class SegmentLevel:
    """Weighted residuals of one level (or bin) of a segment column."""

    level: str
    """The level as text, ``"(missing)"`` for nulls, ``"(other)"`` for pooled levels, or an
    interval such as ``"[2.5, 4)"`` for a numeric column."""
    n: int
    mean_resid: float
    rmse: float
    """Root mean square residual in the level."""
    t: float
    """``mean / (sd / √n)``: the mean residual in standard-error units (NaN below 2 rows)."""


@dataclass(frozen=True)
class RobustStdErrors:
    """Heteroscedasticity-consistent standard errors of one coefficient (NaN if aliased)."""

    hc0: float
    hc1: float
    """HC0 scaled by ``n / (n - p)``."""
    hc2: float
    """Squared residuals divided by ``1 - h``."""
    hc3: float
    """Squared residuals divided by ``(1 - h)²``."""


@dataclass(frozen=True)
class ThresholdCounts:
    """Rows beyond the common-practice thresholds used by the flags (exact counts)."""

    studentized: int
    """Rows with ``|studentized| > 3``."""
    extreme: int
    """Rows with ``|studentized|`` above `extreme_threshold`."""
    extreme_threshold: float
    """The Bonferroni bound: the t quantile (``df_resid - 1`` df) at ``1 - 0.05 / (2 n)``.

    Normal errors put any of the ``n`` externally studentized residuals beyond it in
    fewer than 1 fit in 20.
    """
    leverage: int
    """Rows with leverage above `leverage_threshold`."""
    leverage_threshold: float
    """``2 p / n`` with ``p`` the rank and ``n`` the rows of the fit."""
    cooks: int
    """Rows with Cook's distance above `cooks_threshold`."""
    cooks_threshold: float
    """``4 / n``."""


FlagCode: TypeAlias = Literal[
    "large-studentized",
    "high-leverage",
    "influential-rows",
    "spread-changes",
    "curvature",
    "tails",
    "serial-correlation",
    "shared-trend",
    "many-terms",
]
"""Which rule raised a flag (the rules and their limits: `triage.core.flag_rules`)."""


@dataclass(frozen=True)
class Flag:
    """A rule that fired, with the figures it judged: a hint worth a look, never a verdict.

    `triage.views.flags` puts a flag into words, from these figures and the limits of
    `triage.core.flag_rules`. Fields a rule does not use hold 0 or NaN.
    """

    code: FlagCode
    """Which rule fired; stable across versions."""
    value: float
    """The figure the rule judged: rows beyond a cut-off (``large-studentized``: beyond the
    Bonferroni bound, 0 when none; ``high-leverage``; ``influential-rows``), a p-value
    (``spread-changes``, ``curvature``, ``tails``), the Durbin–Watson statistic
    (``serial-correlation``), R² (``shared-trend``) or estimated coefficients
    (``many-terms``)."""
    cutoff: float = math.nan
    """A cut-off that depends on the fit: the Bonferroni bound, ``2p/n`` or ``4/n``."""
    rows: int = 0
    """Rows of the fit (``large-studentized``, ``many-terms``)."""
    beyond_limit: int = 0
    """``large-studentized``: rows beyond ± `STUDENTIZED_LIMIT` when chance alone would
    rarely give that many, else 0."""
    expected: float = math.nan
    """``large-studentized``: rows chance puts beyond ± `STUDENTIZED_LIMIT` with normal
    errors."""
    skewness: float = math.nan
    """``tails``: skewness of the weighted residuals (0 for a normal)."""
    excess_kurtosis: float = math.nan
    """``tails``: kurtosis minus 3 (0 for a normal)."""


@dataclass(frozen=True, eq=False)
class Diagnostics:
    """Everything pass 2 found; plain values ready for text, JSON or a screen."""

    n: int
    """Rows seen in pass 2."""
    histogram: ResidualHistogram
    binned: dict[str, tuple[ResidualBin, ...]]
    """``"fitted"`` and each numeric predictor -> bins in ascending order."""
    worst: dict[Criterion, tuple[WorstRow, ...]]
    """Criterion -> rows, worst first (ties: lower row position first)."""
    segments: dict[str, tuple[SegmentLevel, ...]]
    """Segment column -> levels by ``|t|`` descending (NaN last); empty levels left out."""
    segments_capped: tuple[str, ...]
    """Segment columns that had more levels than `max_segment_levels`."""
    tests: dict[str, ResidualTest]
    """``breusch_pagan``, ``reset``, ``jarque_bera``, ``durbin_watson``."""
    robust_se: dict[str, RobustStdErrors]
    """Coefficient name -> HC0–HC3 standard errors."""
    counts: ThresholdCounts
    resid_skewness: float
    """Moment skewness of the weighted residuals."""
    resid_kurtosis: float
    """Moment kurtosis of the weighted residuals (3 for a normal)."""
    flags: tuple[Flag, ...]
    studentized_quantiles: dict[float, float]
    """Probability -> quantile of the externally studentized residuals, from a fine grid
    (steps of 0.01 within ±10); empty without rows. Drawn against the normal's quantiles."""


@dataclass(frozen=True)
class ResidualTest:
    """Result of one test on the residuals.

    Attributes
    ----------
    statistic : float
        The test statistic (NaN when the data cannot support the test).
    df : tuple of float
        Degrees of freedom of its reference distribution (one for chi-squared, two for F,
        none for Durbin–Watson).
    p_value : float
        Upper-tail probability; NaN for Durbin–Watson, which has no simple reference law.
    """

    statistic: float
    df: tuple[float, ...]
    p_value: float
