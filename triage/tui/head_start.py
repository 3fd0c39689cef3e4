"""Opening the data, and the work begun before the app draws its first frame.

`triage open` starts a `HeadStart` before it imports Textual, so the file is opened and
profiled, and the model given on the command line fitted on the sample, while the interface
loads. The main screen takes each result where it would otherwise compute it, and only when
it asks for exactly what was computed; anything else it computes itself as usual.

This module imports only the standard library at top level: the data layer and the engine
load inside the head start's thread.
"""

from __future__ import annotations

import functools
import gc
import threading
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import Future
from dataclasses import dataclass
from typing import TYPE_CHECKING, Final, TypeVar

from triage.errors import PassCancelled, TriageError, one_line

if TYPE_CHECKING:
    import polars as pl

    from triage.core.spec import ModelSpec
    from triage.data.source import CsvOptions, Source
    from triage.results.fit import FitOutcome, ReportOutcome
    from triage.tui.settings import Settings

PROFILE_ROWS: Final = 20_000
"""Rows read to profile the columns when the data opens."""

MAX_SEGMENT_COLUMNS: Final = 8
"""Most columns the diagnostics pass breaks residuals down by."""

MAX_SEGMENT_LEVELS: Final = 50
"""A numeric column with at most this many distinct values in the sample can segment."""

CANCEL_POLL_S: Final = 0.05
"""How often a screen waiting on the head start's fit checks that it still wants it."""

_T = TypeVar("_T")


def collect_again() -> None:
    """Turn the garbage collector back on, with what was loaded so far frozen out of its sweeps.

    What the start loads (modules, classes, the screen's widgets) lives as long as the app.
    Left in the collector's view, each full sweep walked it all: 140-190 ms in the middle of
    a keystroke (measured stepping through rows of a 20M-row file).
    """
    gc.freeze()
    gc.enable()


@dataclass(frozen=True)
class OpenedData:
    """A source just opened, with the profile of its columns."""

    source: Source
    """The opened source."""
    profile: pl.DataFrame
    """One row per column, from `profile_columns` on a small sample."""


def open_and_profile(path: str, *, csv: CsvOptions | None, seed: int) -> OpenedData:
    """Open a source and profile its columns on a small sample.

    Raises
    ------
    TriageError
        When the source cannot be opened or read.
    """
    from triage.data.profile import profile_columns
    from triage.data.source import CsvOptions, open_source

    source = open_source(path, csv=csv or CsvOptions())
    schema = source.schema()
    sample = source.read_sample(list(schema), n_rows=PROFILE_ROWS, seed=seed, sampling="groups")
    return OpenedData(source, profile_columns(schema, sample.frame))


def segment_columns(schema: Mapping[str, pl.DataType], profile: pl.DataFrame) -> tuple[str, ...]:
    """Choose columns to break residuals down by: text-like ones, then few-valued numbers."""
    from triage.core.spec import is_categorical_dtype

    text_like = [n for n, d in schema.items() if is_categorical_dtype(d)]
    few = [
        row["name"]
        for row in profile.iter_rows(named=True)
        if row["name"] not in text_like
        and schema[row["name"]].is_integer()
        and 1 < row["distinct"] <= MAX_SEGMENT_LEVELS
    ]
    return tuple([*text_like, *few][:MAX_SEGMENT_COLUMNS])


@dataclass(frozen=True)
class _SampleFit:
    """What the head start fits: the screen adopts it only when it asks for the same."""

    spec: ModelSpec
    by: tuple[str, ...]


class HeadStart:
    """Opens the data and fits the command line's model on the sample, in a thread of its own.

    Parameters
    ----------
    settings : Settings
        The session's settings; nothing is started when they name no data.
    """

    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        """The settings the work follows."""
        self._opened: Future[OpenedData] = Future()
        self._fit: Future[FitOutcome] = Future()
        self._report: Future[ReportOutcome] = Future()
        self._planned: _SampleFit | None = None
        self._lock = threading.Lock()
        self._taken: set[str] = set()
        self._cancel = threading.Event()
        self._thread = threading.Thread(target=self._run, name="triage-head-start", daemon=True)
        self._collecting = gc.isenabled()
        self.plan_failure: str | None = None
        """One line saying why the command line's model could not be fitted ahead, if so."""

    def start(self) -> HeadStart:
        """Start the thread; returns self.

        The garbage collector pauses until the thread's work is done (its sweeps took about
        0.1 s of the launch): the start allocates much and frees little. It is turned back on
        afterwards only if it was on when the thread started.
        """
        if self.settings.data is not None:
            self._collecting = gc.isenabled()
            gc.disable()
            self._thread.start()
        return self

    def stop(self) -> None:
        """Stop the work (the app is closing) and wait for the thread, at most one step."""
        self._cancel.set()
        if self._thread.is_alive():
            self._thread.join()

    def _run(self) -> None:
        try:
            self._work()
        except Exception as error:  # nobody waits forever: each waiter receives the error
            for future in (self._opened, self._fit, self._report):
                if not future.done():
                    future.set_exception(error)
        finally:
            if self._collecting:
                collect_again()

    def _take(self, what: str) -> bool:
        """Claim a result once: True the first time `what` is asked for."""
        with self._lock:
            if what in self._taken:
                return False
            self._taken.add(what)
            return True

    def _work(self) -> None:
        settings = self.settings
        assert settings.data is not None
        try:
            opened = open_and_profile(settings.data, csv=settings.csv, seed=settings.seed)
        except Exception as error:  # handed to the screen, which reports it
            self._opened.set_exception(error)
            return
        self._planned = None if self._cancel.is_set() else self._plan(opened)
        self._opened.set_result(opened)
        if self._planned is None:
            return
        from triage.engine.passes import run_report

        try:
            report = run_report(
                opened.source,
                self._planned.spec,
                rows=settings.sample_rows,
                seed=settings.seed,
                sampling=settings.sampling,
                top_k=settings.top_k,
                by=self._planned.by,
                is_ordered=settings.is_ordered,
                cancel=self._cancel,
                on_fit=self._fit.set_result,
                column_figures=True,
            )
        except Exception as error:  # handed to the screen, which reports it
            if not self._fit.done():
                self._fit.set_exception(error)
            self._report.set_exception(error)
        else:
            self._report.set_result(report)

    def _plan(self, opened: OpenedData) -> _SampleFit | None:
        """Return the sample fit the screen will ask for, or None when it cannot start one.

        A failure other than a `TriageError` (which the screen shows when it checks the model)
        is kept in `plan_failure` as one line: the data opened all the same, and the screen
        goes on without the head start's fit.
        """
        try:
            return self._sample_fit(opened)
        except TriageError:
            return None
        except Exception as error:
            why = one_line(f"{type(error).__name__}: {error}")
            self.plan_failure = f"could not fit ahead: {why}"
            return None

    def _sample_fit(self, opened: OpenedData) -> _SampleFit | None:
        from triage.tui.session import draft_from_settings

        draft = draft_from_settings(self.settings)
        if draft.target is None:
            return None
        schema = opened.source.schema()
        draft = draft.with_terms_text(self.settings.terms) if self.settings.terms else draft
        from triage.data.text_columns import text_column_facts

        check = functools.partial(text_column_facts, opened.source)
        spec = draft.to_spec(schema, self.settings, check)
        return _SampleFit(spec, segment_columns(schema, opened.profile))

    def take_opened(self, path: str) -> OpenedData | None:
        """Return the opened data when `path` is the settings' data (once), else None.

        Blocks until the data is open. Raises what opening raised.
        """
        if path != self.settings.data or not self._take("opened"):
            return None
        return self._opened.result()

    def take_report(
        self,
        spec: ModelSpec,
        by: Sequence[str],
        *,
        cancel: threading.Event,
        on_fit: Callable[[FitOutcome], None],
    ) -> ReportOutcome | None:
        """Return the sample fit's report when it is of `spec` and `by` (once), else None.

        Works as `run_report` does for the caller: `on_fit` receives the fit as soon as it is
        ready, and setting `cancel` stops the wait (and the head start's pass). A request for
        another model stops the head start's pass, which can no longer be used.

        Raises
        ------
        PassCancelled
            When `cancel` is set before the report is ready.
        TriageError
            What the pass raised.
        """
        if not self._take("report"):
            return None
        if self._planned != _SampleFit(spec, tuple(by)):
            self._cancel.set()
            return None
        on_fit(self._wait(self._fit, cancel))
        return self._wait(self._report, cancel)

    def _wait(self, future: Future[_T], cancel: threading.Event) -> _T:
        """Wait for `future`, giving up (and stopping the pass) when `cancel` is set."""
        while True:
            try:
                return future.result(timeout=CANCEL_POLL_S)
            except TimeoutError:
                if cancel.is_set():
                    self._cancel.set()
                    msg = "the pass was stopped before it finished"
                    raise PassCancelled(msg) from None
