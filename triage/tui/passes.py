"""Which pass owns which fit: pass ids, fit numbers, claims on the screen, and the pass itself.

The main screen asks `PassLedger` what a pass that starts, shows a fit early, ends or
fails means for the fit on screen, and runs each pass in a thread worker with `run_pass`.
Nothing here draws; the screen does.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from itertools import count
from typing import TYPE_CHECKING

from textual.worker import get_current_worker

from triage._typing import ALL_ROWS
from triage.errors import PassCancelled, TriageError
from triage.tui.messages import (
    FitComputed,
    PassFailed,
    PassFinished,
    PassProgressed,
    PassStopped,
)
from triage.tui.session import FitLabel

if TYPE_CHECKING:
    from textual.message import Message

    from triage._typing import RowsToRead
    from triage.core.spec import ModelSpec
    from triage.data.source import Source
    from triage.engine.cluster import ClusterEngine
    from triage.results.fit import DataSummary, FitOutcome
    from triage.results.progress import PassProgress
    from triage.tui.head_start import HeadStart
    from triage.tui.settings import Settings


@dataclass(frozen=True)
class PassJob:
    """What one pass fits: the checked model, rows left out, and the fit it compares with."""

    pass_id: int
    """Carried in the pass's messages so late ones from a cancelled pass are dropped."""
    spec: ModelSpec
    """The model, checked against the source's columns."""
    excluded: frozenset[int]
    """Source positions left out (a what-if refit)."""
    baseline: int | None
    """Number of the fit a what-if refit is compared with."""
    is_full: bool
    """Reads every row (in the background) rather than the sample."""


@dataclass(frozen=True)
class PassEnd:
    """What a pass that ended with a fit means for the session (`PassLedger.finish`)."""

    number: int
    """The fit's number: the one it took when it showed early, else the next free one."""
    is_full: bool
    """It was the running pass over every row."""
    takes_screen: bool
    """Its fit replaces the one on screen; otherwise it only joins the Fits list."""


class PassLedger:
    """Pass ids, fit numbers and which passes may take the screen, for one session.

    The passes whose results take the screen are the latest one asked for (with the sample
    fit of the same model while a full pass of it runs), none once a fit was chosen from the
    list. Any other pass's result never replaces the fit on screen: a full pass joins the
    Fits list, a sample fit is dropped.
    """

    def __init__(self) -> None:
        self._pass_ids = count(1)
        self._next_number = 1
        self.reserved: dict[int, int] = {}
        """Fit number given to a pass (by id) whose fit is on screen before it finished."""
        self.running_job: PassJob | None = None
        """What the running full pass fits, or None."""
        self.screen_passes: set[int] = set()
        """Ids of the passes whose results take the screen."""
        self.sample_job: PassJob | None = None
        """The latest sample fit asked for, until it ends."""
        self.pending: tuple[int, FitLabel] | None = None
        """(pass id, label) of a sample fit on screen whose diagnostics are still running."""

    @property
    def running_pass(self) -> int | None:
        """Id of the running full pass, or None."""
        return None if self.running_job is None else self.running_job.pass_id

    def start(
        self, spec: ModelSpec, excluded: frozenset[int], baseline: int | None, *, is_full: bool
    ) -> tuple[PassJob, PassJob | None]:
        """Give a new pass its id and the screen; return it and the full pass it replaces.

        A sample fit and a full pass of one model both take the screen: the sample first.
        """
        job = PassJob(next(self._pass_ids), spec, excluded, baseline, is_full)
        other = self.sample_job if is_full else self.running_job
        if (
            other is not None
            and other.pass_id in self.screen_passes
            and (other.spec, other.excluded) == (spec, excluded)
        ):
            self.screen_passes = {other.pass_id, job.pass_id}
        else:
            self.screen_passes = {job.pass_id}
        replaced = None
        if is_full:
            replaced, self.running_job = self.running_job, job
        else:
            self.sample_job = job
        return job, replaced

    def release_screen(self) -> None:
        """No running pass takes the screen any more (a fit was chosen from the list)."""
        self.screen_passes = set()

    def lost_screen(self) -> PassJob | None:
        """Return the running full pass if its fit will no longer take the screen."""
        job = self.running_job
        return None if job is None or job.pass_id in self.screen_passes else job

    def take_number(self) -> int:
        """Return the next free fit number."""
        number = self._next_number
        self._next_number += 1
        return number

    def show_early(self, pass_id: int, outcome: FitOutcome) -> FitLabel | None:
        """Give a sample fit shown before its diagnostics its number; None if it may not show."""
        if pass_id not in self.screen_passes:
            return None
        number = self.take_number()
        self.reserved[pass_id] = number
        label = FitLabel.of(number, outcome, outcome.data.rows_excluded)
        self.pending = (pass_id, label)
        return label

    def end_full_pass(self, pass_id: int) -> bool:
        """Forget the running full pass if it is `pass_id`; return True if it was."""
        if pass_id != self.running_pass:
            return False
        self.running_job = None
        return True

    def end_pass(self, pass_id: int) -> bool:
        """Forget a pass that ended without a fit: its number, its claim on the screen.

        Returns True when its fit was on screen early (the screen shows the previous fit
        again).
        """
        number = self.reserved.pop(pass_id, None)
        if number is not None and number == self._next_number - 1:
            self._next_number = number  # nobody took a later number: no gap in the list
        was_shown = self.pending is not None and self.pending[0] == pass_id
        if was_shown:
            self.pending = None
        self.screen_passes.discard(pass_id)
        if self.sample_job is not None and self.sample_job.pass_id == pass_id:
            self.sample_job = None
        return was_shown

    def finish(self, pass_id: int) -> PassEnd | None:
        """Give the fit of a pass that ended its number; None for a late sample fit (dropped).

        Call `end_pass` for a dropped one. A full pass ends every claim on the screen; a
        sample fit only its own.
        """
        is_full = self.end_full_pass(pass_id)
        takes_screen = pass_id in self.screen_passes
        if not is_full and not takes_screen:
            return None
        number = self.reserved.pop(pass_id, None) or self.take_number()
        if takes_screen:
            self.screen_passes = set() if is_full else self.screen_passes - {pass_id}
            if self.sample_job is not None and self.sample_job.pass_id == pass_id:
                self.sample_job = None
        return PassEnd(number, is_full, takes_screen)


def run_pass(
    job: PassJob,
    *,
    rows: RowsToRead,
    source: Source,
    settings: Settings,
    segment_columns: tuple[str, ...],
    head_start: HeadStart | None,
    engine: ClusterEngine | None,
    post: Callable[[Message], object],
) -> None:
    """Run one pass of `job` in the current thread worker and post how it ended.

    A sample fit the head start already made (or is making) of the same model is taken
    over instead of computed again.
    """
    from triage.engine.passes import run_report

    worker = get_current_worker()

    def report_progress(progress: PassProgress) -> None:
        post(PassProgressed(job.pass_id, progress))

    def report_fit(outcome: FitOutcome) -> None:
        if not worker.is_cancelled:
            post(FitComputed(job.pass_id, outcome))

    if rows is ALL_ROWS or job.excluded:
        head_start = None
    try:
        early = (
            None
            if head_start is None
            else head_start.take_report(
                job.spec, segment_columns, cancel=worker.cancelled_event, on_fit=report_fit
            )
        )
        report = early or run_report(
            source,
            job.spec,
            engine=engine,
            rows=rows,
            seed=settings.seed,
            sampling=settings.sampling,
            exclude_rows=job.excluded,
            top_k=settings.top_k,
            by=segment_columns,
            is_ordered=settings.is_ordered,
            on_progress=None if rows is not ALL_ROWS else report_progress,
            cancel=worker.cancelled_event,
            on_fit=None if rows is ALL_ROWS else report_fit,
            column_figures=True,
        )
    except PassCancelled:
        post(PassStopped(job.pass_id))
    except TriageError as error:
        post(PassFailed(job.pass_id, str(error), "the fit failed"))
    else:
        if worker.is_cancelled:  # a newer request replaced this one while it finished
            post(PassStopped(job.pass_id))
        else:
            post(PassFinished(job.pass_id, report, job.excluded, job.baseline))


def basis_text(number: int, data: DataSummary, *, excluded: bool) -> str:
    """Say which rows a fit's results come from, for the pass line.

    Parameters
    ----------
    number : int
        The fit's number in the session.
    data : DataSummary
        The rows it used.
    excluded : bool
        Marked rows were left out (a what-if refit).

    Returns
    -------
    str
        E.g. `fit #2 from a SAMPLE: 200,000 of 20,000,000 rows used`.
    """
    from triage.views.format import format_count

    total = "?" if data.rows_in_source is None else format_count(data.rows_in_source)
    used = format_count(data.rows_used)
    left_out = f", {format_count(data.rows_excluded)} marked left out" if excluded else ""
    basis = "EVERY ROW" if data.is_full_pass else "a SAMPLE"
    return f"fit #{number} from {basis}: {used} of {total} rows used{left_out}"
