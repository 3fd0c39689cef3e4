"""Values too large to fit: found by name, and refused in one line, before any sum overflows.

A least-squares pass squares its values (the factor's sums of squares), and the residual
diagnostics raise residuals to the fourth power (kurtosis). float64 ends near 1.8e308, so a
column with values near 1e80 already overflows the diagnostics and one near 1e154 the fit
(measured here with `triage report`). Values up to `VALUE_LIMIT` keep every such sum, over
any number of rows a machine can hold, far inside the range; columns beyond it are refused
with their name, rather than fitted into infinities.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Final

import numpy as np

from triage.errors import DataError

if TYPE_CHECKING:
    from triage.core.lsq import AccumulatedFactor

VALUE_LIMIT: Final = 1e70
"""Largest magnitude of a design column or target: its shift plus the root of its sum of squares.

A residual's sum of squares is then at most 1e140, and sums of fourth powers (no more than
the square of that) at most 1e280: finite.
"""


def too_large_error(label: str, detail: str) -> DataError:
    """Return the one-line error for `label` holding values too large; `detail` says how large."""
    msg = (
        f"`{label}` holds values too large to fit ({detail}; triage accepts up to "
        f"{VALUE_LIMIT:.0e}); rescale it (divide it by a power of ten) or leave the largest "
        "rows out with `--where`"
    )
    return DataError(msg)


def check_column_values(columns: Mapping[str, np.ndarray]) -> None:
    """Raise `DataError` naming the first column with a finite value beyond `VALUE_LIMIT`.

    Parameters
    ----------
    columns : mapping of str to ndarray
        Label (term, column or target) to values; NaN and infinities are not judged here.

    Raises
    ------
    DataError
        Naming the column and its largest magnitude.
    """
    for label, values in columns.items():
        finite = np.abs(values[np.isfinite(values)])
        if finite.size and finite.max() > VALUE_LIMIT:
            raise too_large_error(label, f"the largest is {finite.max():.1e}")


def check_factor_scale(factor: AccumulatedFactor | None, names: Sequence[str], target: str) -> None:
    """Raise `DataError` when a column of an accumulated fit may reach beyond `VALUE_LIMIT`.

    Every value of a column lies within its shift plus the root of its shifted sum of
    squares, which is the norm of the factor's column (``R'R = Z'Z``); so this costs
    O(p²) after a pass, however many rows it read.

    Parameters
    ----------
    factor : AccumulatedFactor or None
        What the pass accumulated (None: no rows, nothing to check).
    names : sequence of str
        Design column labels, in order.
    target : str
        The target's name.

    Raises
    ------
    DataError
        Naming the first column whose bound is above the limit or not finite.
    """
    if factor is None:
        return
    with np.errstate(over="ignore", invalid="ignore"):
        norms = np.linalg.norm(factor.r, axis=0)
        bounds = np.abs(np.append(factor.x_shift, factor.y_shift)) + norms
    for label, bound in zip([*names, target], bounds, strict=True):
        if not bound <= VALUE_LIMIT:
            detail = (
                f"the root of their sum of squares is {bound:.1e}"
                if np.isfinite(bound)
                else "the sum of their squares overflows"
            )
            raise too_large_error(label, detail)
