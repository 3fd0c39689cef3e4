"""Specification tests on residuals, computed in one streaming pass and mergeable.

- Breusch–Pagan in Koenker's studentized form: ``n R²`` of the squared residuals regressed on
  the design (an auxiliary `QRAccumulator` on ``[X | e²]``), chi-squared with rank - 1 df.
- RESET: F test of adding the squared and cubed fitted values (standardised) to the design, by
  an auxiliary `QRAccumulator` on ``[X | ŷ², ŷ³ | y]``; Wald form, as statsmodels computes it.
- Jarque–Bera from mergeable central moments of the residuals, chi-squared with 2 df.
- Durbin–Watson in file order, carrying the residuals at batch edges.

A small p-value or an unusual statistic is an aid to judgement, not a verdict.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from triage.core.distributions import chi2_sf, f_sf
from triage.core.indicators import CodedDesign
from triage.core.lsq import QRAccumulator
from triage.results.diagnostics import ResidualTest

if TYPE_CHECKING:
    from collections.abc import Sequence

    from triage.core.moments import StreamMoments

FloatArray = NDArray[np.float64]


_NAN_TEST_CHI2_2 = ResidualTest(math.nan, (2.0,), math.nan)


class BreuschPaganAccumulator:
    """Auxiliary regression of squared residuals on the design, with a constant (Koenker form).

    Parameters
    ----------
    n_cols : int
        Design columns of the main fit, its intercept included.
    has_intercept : bool
        Whether the main design has the intercept as column 0; if not, a constant column is
        put in front of the auxiliary design (the test needs one).
    """

    def __init__(self, n_cols: int, *, has_intercept: bool, unshifted: Sequence[int] = ()) -> None:
        self._prepend_ones = not has_intercept
        self._n_cols = n_cols + int(self._prepend_ones)
        self._acc = QRAccumulator(
            self._n_cols, has_intercept=True, unshifted=[] if self._prepend_ones else unshifted
        )

    def update(self, x: FloatArray, resid: FloatArray) -> None:
        """Add design rows and their (weighted) residuals."""
        if self._prepend_ones:
            x = np.column_stack((np.ones(x.shape[0]), x))
        self._acc.update(x, resid * resid)

    def update_coded(self, design: CodedDesign, resid: FloatArray) -> None:
        """Add coded rows (of a design with an intercept) and their (weighted) residuals."""
        self._acc.update_coded(design, resid * resid)

    def merge(self, other: BreuschPaganAccumulator) -> None:
        """Fold another accumulator over the same design into this one."""
        self._acc.merge(other._acc)

    def finalize(self) -> ResidualTest:
        """LM = n R² of the auxiliary fit, chi-squared with (auxiliary rank - 1) df."""
        if self._acc.n_rows == 0:
            return ResidualTest(math.nan, (math.nan,), math.nan)
        aux = self._acc.finalize([f"c{j}" for j in range(self._n_cols)])
        df = self._n_cols - len(aux.aliased) - 1
        if df < 1 or aux.df_resid < 1 or not math.isfinite(aux.r2):
            return ResidualTest(math.nan, (float(df),), math.nan)
        lm = aux.n * aux.r2
        return ResidualTest(lm, (float(df),), chi2_sf(lm, df))


class ResetAccumulator:
    """Auxiliary regression of the target on the design plus ``z²`` and ``z³``, ``z`` scaled ŷ.

    ``z = (ŷ - center) / scale`` with constants from pass 1 or the sample, so the powers stay
    well scaled. With an intercept in the design, ``z²`` and ``z³`` span the same space as
    ŷ² and ŷ³ (ŷ lies in the span of the design), so the F test equals the unscaled one;
    without an intercept `center` must be 0 for that, and the caller passes 0.

    Parameters
    ----------
    n_cols : int
        Design columns of the main fit.
    has_intercept : bool
        Whether column 0 of the design is the intercept.
    center, scale : float
        Standardisation of the fitted values.
    """

    def __init__(
        self,
        n_cols: int,
        *,
        has_intercept: bool,
        center: float,
        scale: float,
        unshifted: Sequence[int] = (),
    ) -> None:
        self._n_cols = n_cols + 2
        self._center = center
        self._scale = scale
        self._acc = QRAccumulator(self._n_cols, has_intercept=has_intercept, unshifted=unshifted)

    def update(
        self, x: FloatArray, y: FloatArray, fitted: FloatArray, weights: FloatArray | None
    ) -> None:
        """Add design rows, targets, fitted values and weights (None for an unweighted fit)."""
        z = (fitted - self._center) / self._scale
        n_design = x.shape[1]
        # Fortran order, like design batches: the accumulator reads it column by column.
        augmented = np.empty((x.shape[0], n_design + 2), order="F")
        augmented[:, :n_design] = x
        np.multiply(z, z, out=augmented[:, n_design])
        np.multiply(augmented[:, n_design], z, out=augmented[:, n_design + 1])
        self._acc.update(augmented, y, weights)

    def update_coded(
        self, design: CodedDesign, y: FloatArray, fitted: FloatArray, weights: FloatArray | None
    ) -> None:
        """Add coded rows: ``z²`` and ``z³`` join the dense columns, after every design column."""
        z = (fitted - self._center) / self._scale
        z2 = z * z
        p = design.n_cols
        augmented = CodedDesign(
            dense=[*design.dense, z2, z2 * z],
            dense_positions=np.append(design.dense_positions, [p, p + 1]),
            factors=design.factors,
            n_cols=p + 2,
            has_intercept=design.has_intercept,
        )
        self._acc.update_coded(augmented, y, weights)

    def merge(self, other: ResetAccumulator) -> None:
        """Fold another accumulator over the same design into this one."""
        self._acc.merge(other._acc)

    def finalize(self) -> ResidualTest:
        """Wald F of the two added coefficients (2 and the auxiliary residual df)."""
        if self._acc.n_rows == 0:
            return ResidualTest(math.nan, (2.0, math.nan), math.nan)
        names = [f"c{j}" for j in range(self._n_cols)]
        aux = self._acc.finalize(names)
        df2 = float(aux.df_resid)
        added = names[-2:]
        if any(name in aux.aliased for name in added) or aux.df_resid < 1:
            return ResidualTest(math.nan, (2.0, df2), math.nan)
        b = aux.coef[-2:]
        cov = aux.cov[-2:, -2:]
        try:
            f = float(b @ np.linalg.solve(cov, b)) / 2.0
        except np.linalg.LinAlgError:
            return ResidualTest(math.nan, (2.0, df2), math.nan)
        return ResidualTest(f, (2.0, df2), f_sf(f, 2.0, df2))


def jarque_bera(moments: StreamMoments) -> ResidualTest:
    """Jarque–Bera ``n/6 (S² + (K - 3)²/4)`` with moment skewness S and kurtosis K, chi2(2)."""
    skew, kurt = moments.skewness(), moments.kurtosis()
    if not (math.isfinite(skew) and math.isfinite(kurt)):
        return _NAN_TEST_CHI2_2
    jb = moments.n / 6.0 * (skew * skew + (kurt - 3.0) ** 2 / 4.0)
    return ResidualTest(jb, (2.0,), chi2_sf(jb, 2))


@dataclass(frozen=True)
class _Run:
    """Residuals of one batch of consecutive used rows, from source position `start`."""

    start: int
    n: int
    first: float
    last: float
    sum_sq_diff: float
    sum_sq: float


class DurbinWatsonAccumulator:
    """``Σ (e_t - e_{t-1})² / Σ e_t²`` over rows in file order.

    Each batch is kept as a run of six numbers keyed by the source position of its first
    row, so batches may come in any order and accumulators merge in any order (a pass split
    over threads): `finalize` joins the runs by position. Memory grows with the number of
    batches, not of rows.
    """

    def __init__(self) -> None:
        self._runs: list[_Run] = []

    def update(self, resid: FloatArray, start: int) -> None:
        """Add the residuals of consecutive rows whose first row is at source position `start`."""
        if resid.size == 0:
            return
        diff = np.diff(resid)
        self._runs.append(
            _Run(
                start=start,
                n=int(resid.size),
                first=float(resid[0]),
                last=float(resid[-1]),
                sum_sq_diff=float(diff @ diff),
                sum_sq=float(resid @ resid),
            )
        )

    def merge(self, other: DurbinWatsonAccumulator) -> None:
        """Add the runs of `other`, from anywhere in the file."""
        self._runs.extend(other._runs)

    def finalize(self) -> ResidualTest:
        """Return the statistic (NaN below 2 rows or with all-zero residuals); no p-value."""
        runs = sorted(self._runs, key=lambda run: run.start)
        n = sum(run.n for run in runs)
        sum_sq = sum(run.sum_sq for run in runs)
        if n < 2 or sum_sq <= 0.0:
            return ResidualTest(math.nan, (), math.nan)
        sum_sq_diff = sum(run.sum_sq_diff for run in runs)
        sum_sq_diff += sum((b.first - a.last) ** 2 for a, b in itertools.pairwise(runs))
        return ResidualTest(sum_sq_diff / sum_sq, (), math.nan)
