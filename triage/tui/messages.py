"""App-wide messages, named as past-tense events; workers post them, the screen handles them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from textual.message import Message

if TYPE_CHECKING:
    import polars as pl

    from triage.results.diagnostics import RowDiagnostics
    from triage.results.fit import FitOutcome, ReportOutcome
    from triage.results.progress import PassProgress


@dataclass
class SourceOpened(Message):
    """The data source opened and its column profile is ready."""

    source: Any
    """The opened `triage.data.source.Source`."""
    profile: pl.DataFrame
    """One row per column: name, type, share missing and summary numbers from the sample."""


@dataclass
class PassProgressed(Message):
    """A running full pass reported progress (a newer report replaces an unhandled older one)."""

    pass_id: int
    """Which pass reported, so reports from a cancelled pass are dropped."""
    progress: PassProgress
    """Rows done, rows per second and time left."""

    def can_replace(self, message: Message) -> bool:
        """Return True for an older progress report of the same pass."""
        return isinstance(message, PassProgressed) and message.pass_id == self.pass_id


@dataclass
class FitComputed(Message):
    """The fit of a sample pass is ready; its residual diagnostics are still running."""

    pass_id: int
    """Which pass it belongs to."""
    outcome: FitOutcome
    """The fit (pass 1) and the rows it used."""


@dataclass
class ChecksFinished(Message):
    """The robust refit and the curvature check of one fit are ready, as text."""

    number: int
    """Number of the fit checked."""
    text: str
    """Both checks, rendered for reading."""


@dataclass
class PassFinished(Message):
    """A fit with its diagnostics finished, on a sample or on every row."""

    pass_id: int
    """Which pass finished."""
    report: ReportOutcome
    """The fit and its diagnostics."""
    excluded: frozenset[int]
    """Source positions left out of this fit (marked rows of a what-if refit)."""
    baseline: int | None
    """Number of the fit a what-if refit is compared with, else None."""


@dataclass
class PassStopped(Message):
    """A full pass was cancelled by the user before it finished."""

    pass_id: int
    """Which pass stopped."""


@dataclass
class PassFailed(Message):
    """A pass, a row read or an export ended with an error the user should read."""

    pass_id: int
    """Which pass failed (0 for opening the data, -1 for a row read or an export)."""
    message: str
    """The error text, ready to show."""
    title: str
    """Short heading naming what failed."""


@dataclass
class RowsFetched(Message):
    """Original rows and their diagnostics arrived for the drill-down pane."""

    fit_number: int
    """The fit the diagnostics belong to (dropped unless that fit is on screen)."""
    position: int
    """Source position of the row asked for."""
    frame: pl.DataFrame
    """The whole original row (every column)."""
    diagnostics: RowDiagnostics | None
    """Its fitted value, residual, leverage, studentized residual and Cook's distance."""


@dataclass
class ExportWritten(Message):
    """An export of rows finished."""

    fit_number: int
    """The fit whose diagnostics the rows carry."""
    path: str
    """Where the rows were written."""
    n_rows: int
    """How many rows were written."""
