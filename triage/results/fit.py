"""A fit and a report as the engine hands them up: results with the rows they were computed on."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import polars as pl

    from triage.core.design import DesignBuilder
    from triage.core.lsq import LinearFit
    from triage.core.spec import ModelSpec
    from triage.results.diagnostics import Diagnostics

__all__ = ["ColumnFigures", "DataSummary", "FitOutcome", "ReportOutcome"]


@dataclass(frozen=True)
class DataSummary:
    """Which rows a result was computed on, and why the others were left out."""

    source: str
    rows_in_source: int | None
    rows_read: int
    rows_filtered_out: int
    rows_dropped_missing: int
    rows_dropped_domain: int
    rows_dropped_unseen_level: int
    rows_excluded: int
    rows_used: int
    sample: str | None
    """None when every row was read, else how the sample was drawn."""
    sample_warning: str | None
    is_full_pass: bool

    @property
    def rows_dropped(self) -> int:
        """Rows left out for missing values, domain errors or unseen levels."""
        return self.rows_dropped_missing + self.rows_dropped_domain + self.rows_dropped_unseen_level


@dataclass(frozen=True)
class ColumnFigures:
    """One column's figures over every row of the source (`FitOutcome.column_figures`)."""

    name: str
    rows: int
    """Rows read."""
    missing: int
    """Rows with no usable value (null, NaN or ±inf)."""
    low: float | None
    """Smallest value; None for a column that is not numeric or has no value."""
    mean: float | None
    sd: float | None
    """Standard deviation (n - 1 in the denominator); None with fewer than two values."""
    high: float | None


@dataclass(frozen=True)
class FitOutcome:
    """A fitted model together with what it was fitted on."""

    spec: ModelSpec
    builder: DesignBuilder
    fit: LinearFit
    data: DataSummary
    sample: pl.DataFrame
    """The in-memory sample the builder learned from (and the quick fit used).

    Empty after `fit_model` streamed every row of a model with nothing to learn.
    """
    column_figures: tuple[ColumnFigures, ...] = ()
    """The model's columns over every row of the source, from a pass that read every row
    with no filter and no rows left out; empty otherwise."""


@dataclass(frozen=True)
class ReportOutcome:
    """A fit and its residual diagnostics, computed on the same rows."""

    outcome: FitOutcome
    diagnostics: Diagnostics
