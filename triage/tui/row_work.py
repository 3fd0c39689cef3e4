"""Work on rows of a fit, off the event loop: reading rows, the checks, exports.

The main screen runs each function below in a thread worker of its own group; each posts
what it found (or why it failed) to the screen through `post`, and stops posting once its
worker is cancelled. `RowCache` keeps the rows already read under the fit on screen.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Final

from textual.worker import get_current_worker

from triage.errors import TriageError
from triage.tui.messages import ChecksFinished, ExportWritten, PassFailed, RowsFetched

if TYPE_CHECKING:
    from textual.message import Message

    from triage.data.source import Source
    from triage.tui.screens.export import ExportRequest
    from triage.tui.session import SessionFit
    from triage.tui.widgets.panes import RowView

Post = Callable[["Message"], object]
"""How a worker hands a message to the screen (`post_message`)."""

ROW_CACHE_SIZE: Final = 256
"""Original rows kept after fetching, so stepping back and forth reads nothing again."""


class RowCache:
    """Rows read under one fit, by source position, newest last; the oldest go first."""

    def __init__(self) -> None:
        self._rows: OrderedDict[int, RowView] = OrderedDict()

    def get(self, position: int, fit_number: int) -> RowView | None:
        """Return the row at `position` read under fit `fit_number`, or None."""
        view = self._rows.get(position)
        if view is None or view.fit_number != fit_number:
            return None
        self._rows.move_to_end(position)
        return view

    def add(self, view: RowView) -> None:
        """Keep a row just read, letting the oldest go past `ROW_CACHE_SIZE`."""
        self._rows[view.position] = view
        while len(self._rows) > ROW_CACHE_SIZE:
            self._rows.popitem(last=False)

    def missing(self, positions: Sequence[int]) -> list[int]:
        """Return the positions not kept, in the order given."""
        return [position for position in positions if position not in self._rows]

    def keep_fit(self, fit_number: int) -> None:
        """Forget every row when they were read under another fit than `fit_number`."""
        if self._rows and next(iter(self._rows.values())).fit_number != fit_number:
            self._rows.clear()


def read_row(source: Source, fit: SessionFit, position: int, post: Post) -> None:
    """Read the whole original row at `position` and diagnose it under `fit`."""
    from triage.engine.passes import diagnose_rows

    try:
        frame, diagnostics = diagnose_rows(
            source, fit.report.outcome, [position], exclude_rows=fit.excluded
        )
    except TriageError as error:
        post(PassFailed(-1, str(error), "cannot read the row"))
        return
    if not get_current_worker().is_cancelled:
        post(RowsFetched(fit.number, position, frame, diagnostics))


def read_rows_ahead(source: Source, fit: SessionFit, positions: Sequence[int], post: Post) -> None:
    """Read and diagnose rows in one pass over their row groups, posting each one.

    Stepping through worst rows then redraws from the cache at once instead of reading
    a row group per key press (measured: about 200 ms a step on a 20-million-row file).
    """
    from triage.core.design import ROW_INDEX
    from triage.engine.passes import diagnose_rows

    try:
        frame, diagnostics = diagnose_rows(
            source, fit.report.outcome, positions, exclude_rows=fit.excluded
        )
    except TriageError:
        return  # stepping reads each row on its own and reports the error there
    worker = get_current_worker()
    for position in positions:
        if worker.is_cancelled:
            return
        row = frame.filter(frame[ROW_INDEX] == position).head(1)
        picked = (diagnostics.rows == position).nonzero()[0][:1]
        post(RowsFetched(fit.number, position, row, diagnostics.take(picked)))


def check_fit(fit: SessionFit, *, seed: int, width: int, post: Post) -> None:
    """Refit `fit` by Huber's method and with splines on its sample; post both as text."""
    from triage.engine.compare import curvature_check_outcome, robust_check_outcome
    from triage.views.compare import render_curvature_check, render_robust_check

    outcome = fit.report.outcome
    try:
        robust = robust_check_outcome(outcome, exclude_rows=fit.excluded)
        curvature = curvature_check_outcome(outcome, folds=5, seed=seed, exclude_rows=fit.excluded)
    except TriageError as error:
        post(PassFailed(-1, str(error), "the checks failed"))
        return
    text = "\n\n".join(
        (
            render_robust_check(robust, width=width),
            render_curvature_check(curvature, width=width),
        )
    )
    if not get_current_worker().is_cancelled:
        post(ChecksFinished(fit.number, text))


def write_rows(
    source: Source,
    fit: SessionFit,
    positions: Sequence[int],
    request: ExportRequest,
    post: Post,
) -> None:
    """Write rows with every column plus their diagnostics under `fit`.

    The rules are those of `triage export`: a temporary file renamed into place, never an
    input file, an existing file replaced only when asked.
    """
    from triage.engine.export import export_rows

    try:
        written = export_rows(
            source,
            fit.report.outcome,
            positions,
            request.path,
            force=request.is_replacing,
            exclude_rows=fit.excluded,
            fit_number=fit.number,
            note=fit.label.one_line(),
        )
    except TriageError as error:
        post(PassFailed(-1, str(error), "the export failed"))
        return
    post(ExportWritten(fit.number, str(written), len(positions)))
