"""Prediction error on rows a fit did not see: held-out scores and K-fold RMSE."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["HoldoutScore", "KFoldErrors", "KFoldResult"]


@dataclass(frozen=True)
class HoldoutScore:
    """How well one coefficient vector predicts the held-out rows."""

    n: int
    """Held-out rows scored."""
    sse: float
    """Sum of (weighted) squared prediction errors."""
    sst: float
    """Sum of (weighted) squares of the target about its held-out mean."""
    r2: float
    """``1 - sse / sst``; NaN when the held-out target is constant or no rows were held out."""
    rmse: float
    """``sqrt(sse / sum(w))``; NaN when no rows were held out."""


@dataclass(frozen=True)
class KFoldResult:
    """Cross-validated prediction error of one design on an in-memory sample."""

    folds: int
    """Number of folds."""
    fold_rmse: tuple[float, ...]
    """RMSE on each held-out fold, from a fit on the other folds."""

    @property
    def rmse(self) -> float:
        """Mean of the per-fold RMSEs (scikit-learn's ``cross_val_score`` convention)."""
        return float(np.mean(self.fold_rmse))


@dataclass(frozen=True)
class KFoldErrors:
    """Held-out errors of one design under K-fold cross-validation, scored two ways."""

    folds: int
    """Number of folds."""
    rmse: float
    """Mean of the per-fold RMSEs (as `KFoldResult.rmse`)."""
    median_abs_error: float
    """Median of every row's absolute held-out error (``sqrt(w) |e|`` with weights).

    A few gross errors move it hardly at all, where they can dominate the RMSE.
    """
