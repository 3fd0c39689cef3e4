"""The main screen: owns the session, runs passes in thread workers, pushes results to panes."""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING, ClassVar, Final, cast

from textual import events, on, work
from textual.app import ComposeResult
from textual.binding import BindingType
from textual.containers import Container
from textual.screen import Screen
from textual.widgets import DataTable
from textual.worker import Worker, WorkerState

from triage._typing import ALL_ROWS, CRITERIA
from triage.errors import TriageError, numeric_warning_message
from triage.tui.head_start import HeadStart, collect_again, open_and_profile, segment_columns
from triage.tui.messages import (
    ChecksFinished,
    ExportWritten,
    FitComputed,
    PassFailed,
    PassFinished,
    PassProgressed,
    PassStopped,
    RowsFetched,
    SourceOpened,
)
from triage.tui.passes import PassJob, PassLedger, basis_text, run_pass
from triage.tui.row_work import RowCache, check_fit, read_row, read_rows_ahead, write_rows
from triage.tui.screens.dialogs import ErrorScreen, PromptScreen, TextScreen
from triage.tui.screens.export import ExportRequest, ExportScreen
from triage.tui.screens.main_keys import COLUMN_ACTIONS, FIT_ACTIONS, MAIN_BINDINGS
from triage.tui.session import (
    ModelDraft,
    SessionFit,
    compare_session_fits,
    draft_from_settings,
    draft_from_spec,
)
from triage.tui.settings import MAX_SHOWN
from triage.tui.widgets.panes import (
    PANE_BY_ID,
    PANES,
    ColumnsPane,
    FitPane,
    FitsPane,
    FlagsPane,
    GroupsPane,
    InputsPane,
    Pane,
    PaneId,
    RowPane,
    RowView,
    SpreadPane,
    TrendPane,
    WorstPane,
)
from triage.tui.widgets.status import KeyFooter, ModelLine, PaneStrip, PassLine

if TYPE_CHECKING:
    from triage._typing import Criterion, RowsToRead
    from triage.core.spec import ModelSpec, TextColumnFacts
    from triage.data.source import Source
    from triage.engine.cluster import ClusterEngine
    from triage.tui.settings import Settings

TILE_MIN_WIDTH: Final = 110
"""From this many columns the panes of one page tile side by side."""

TILE_MIN_HEIGHT: Final = 32
"""From this many lines the panes of one page tile in two rows."""


class MainScreen(Screen[None]):
    """Panes of one session around a status line; the only place that starts passes."""

    BINDINGS: ClassVar[list[BindingType]] = MAIN_BINDINGS

    def __init__(
        self,
        settings: Settings,
        *,
        opened: SourceOpened | None = None,
        head_start: HeadStart | None = None,
    ) -> None:
        super().__init__()
        self.settings = settings
        """How the session was opened."""
        self.opened = opened
        """A source already opened (when another file replaces the session's), else None."""
        self.head_start = head_start
        """Work begun before the app started (the data opened, the given model fitted)."""
        self.cluster: ClusterEngine | None = None
        """The Dask cluster that runs passes over every row, once one has (`Settings.scheduler`)."""
        self.source: Source | None = None
        """The open data source."""
        self._text_facts: dict[str, TextColumnFacts] = {}
        """What a read of each text column used as a number found (read once per source)."""
        self.draft = draft_from_settings(settings)
        """The model as being built."""
        self.fits: list[SessionFit] = []
        """Every fit of the session, oldest first."""
        self.current: SessionFit | None = None
        """The fit on screen."""
        self.marked: set[int] = set()
        """Source positions the user marked."""
        self.front: PaneId = "columns"
        """The pane in front (the only one shown in a small terminal)."""
        self.is_tiled = False
        """True when the terminal is large enough to tile the panes of a page."""
        self.is_robust = False
        """Show robust (HC3) standard errors."""
        self.predictor_index = 0
        """Which numeric predictor the Predictors pane shows."""
        self.criterion_index = 0
        """Which ranking the Worst pane uses (index into `CRITERIA`)."""
        self.segment_index = 0
        """Which column the Segments pane breaks residuals down by."""
        self.segment_columns: tuple[str, ...] = ()
        """Columns the diagnostics pass breaks residuals down by."""
        self.row_position: int | None = None
        """Source position of the row in the Row pane."""
        self.typed_terms: str | None = None
        """The terms text last typed (offered again after a typing mistake)."""
        self.row_cache = RowCache()
        """Rows read under the fit on screen."""
        self.passes = PassLedger()
        """Pass ids, fit numbers and which passes' results take the screen."""
        self.full_pass_worker: Worker[None] | None = None
        """Worker of the running full pass, kept so one key can cancel it."""
        self.checks: dict[int, str] = {}
        """Finished robust and curvature checks, as text, by fit number."""
        self.checking: int | None = None
        """Number of the fit whose checks are running, or None."""
        self.is_opening_on_fit = settings.target is not None
        """Bring the Fit pane forward when the first fit shows (the command line named a
        model), unless the user has left the Columns pane by then."""

    # ----------------------------------------------------------------------------------------
    # layout

    def compose(self) -> ComposeResult:
        """Lay out the pane strip, model line, panes, pass line and footer."""
        yield PaneStrip(id="pane-strip")
        yield ModelLine(id="model-line")
        with Container(id="panes"):
            yield ColumnsPane(PANE_BY_ID["columns"])
            yield FitPane(PANE_BY_ID["fit"])
            yield FlagsPane(PANE_BY_ID["flags"])
            yield FitsPane(PANE_BY_ID["fits"])
            yield SpreadPane(PANE_BY_ID["spread"])
            yield TrendPane(PANE_BY_ID["trend"])
            yield InputsPane(PANE_BY_ID["inputs"])
            yield GroupsPane(PANE_BY_ID["groups"])
            yield WorstPane(PANE_BY_ID["worst"])
            yield RowPane(PANE_BY_ID["row"])
        yield PassLine(id="pass-line")
        yield KeyFooter(compact=True)

    def on_mount(self) -> None:
        """Lay out for the terminal's size, then open the data in the background."""
        for pane in self.query(Pane):
            pane.is_colorless = self.settings.is_colorless
            pane.is_ordered = self.settings.is_ordered
        self._apply_layout()
        self._update_model_line()
        if self.opened is not None:
            self.post_message(SourceOpened(self.opened.source, self.opened.profile))
        elif self.settings.data is not None:
            self.open_data(self.settings.data)

    def on_resize(self) -> None:
        """Tile or stack the panes when the terminal changes size."""
        self._apply_layout()

    def _apply_layout(self) -> None:
        size = self.app.size
        self.is_tiled = size.width >= TILE_MIN_WIDTH and size.height >= TILE_MIN_HEIGHT
        page = PANE_BY_ID[self.front].page
        panes = self.query_one("#panes", Container)
        panes.set_class(self.is_tiled, "-tiled")
        for name in ("model", "residuals", "rows"):
            panes.set_class(self.is_tiled and page == name, f"-page-{name}")
        shown: set[str] = set()
        for pane in self.query(Pane):
            is_shown = pane.info.pane_id == self.front or (self.is_tiled and pane.info.page == page)
            pane.set_class(is_shown, "-shown")
            pane.set_class(pane.info.pane_id == self.front, "-front")
            if is_shown:
                shown.add(pane.info.pane_id)
        strip = self.query_one(PaneStrip)
        strip.current = self.front
        strip.shown = frozenset(shown)
        self.refresh_pane_strip()

    def key_displays(self) -> dict[str, str]:
        """Return the key of each active binding, by binding id, as the active keymap has it.

        A binding with several keys shows its first one.
        """
        displays: dict[str, str] = {}
        for active in self.active_bindings.values():
            if active.binding.id is not None and active.binding.id not in displays:
                displays[active.binding.id] = self.app.get_key_display(active.binding)
        return displays

    def refresh_pane_strip(self) -> None:
        """Show each pane's key, and the model-building keys, as the active keymap has them."""
        displays = self.key_displays()
        self.query_one(PaneStrip).entries = tuple(
            (info.pane_id, displays.get(f"pane-{info.pane_id}", ""), info.title) for info in PANES
        )
        hints = [
            ("set-target", "target"),
            ("toggle-term", "term"),
            ("cycle-transform", "transform"),
            ("toggle-categorical", "categorical"),
            ("set-weights", "weights"),
            ("edit-terms", "type terms"),
            ("edit-filter", "filter"),
        ]
        self.query_one(ColumnsPane).keys_hint = "  ".join(
            f"{displays.get(binding_id, '')} {label}" for binding_id, label in hints
        )

    def pane(self, pane_id: PaneId) -> Pane:
        """Return the pane with id `pane_id`."""
        return self.query_one(f"#pane-{pane_id}", Pane)

    def action_show_pane(self, pane_id: str) -> None:
        """Bring a pane to the front and give it the keyboard."""
        if pane_id not in PANE_BY_ID:
            return
        is_new = pane_id != self.front
        if is_new:
            self.front = cast("PaneId", pane_id)
            self._apply_layout()
        target = self.pane(self.front).focus_target()
        if target.can_focus:
            target.focus()
        if is_new:
            self.refresh_bindings()

    def action_cycle_pane(self, step: int) -> None:
        """Bring the next (step 1) or previous (step -1) pane to the front."""
        ids = [info.pane_id for info in PANES]
        self.action_show_pane(ids[(ids.index(self.front) + step) % len(ids)])

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Grey out keys that need the Columns pane in front, data, or a fit."""
        if action in COLUMN_ACTIONS:
            return None if self.source is None or self.front != "columns" else True
        if action == "cancel_pass":
            return None if self.passes.running_pass is None else True
        if action in {"edit_filter", "edit_terms", "quick_fit", "start_full_pass"}:
            return None if self.source is None else True
        if action in FIT_ACTIONS:  # not while a fit shows without its diagnostics
            return None if self.current is None or self.passes.pending is not None else True
        return True

    # ----------------------------------------------------------------------------------------
    # errors

    def show_error(self, message: str, *, title: str = "something went wrong") -> None:
        """Show a message the user must dismiss; the app stays open."""
        self.app.push_screen(ErrorScreen(message, title=title))

    def report_error(self, message: str, *, title: str, is_background: bool) -> None:
        """Show an error; one from background work is a notification while a dialog is open.

        A window opening over a dialog would take the keys the user is typing into it.
        """
        if is_background and self.app.screen is not self:
            self.notify(f"{title}: {message}", severity="error", timeout=20)
        else:
            self.show_error(message, title=title)

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        """Report a worker that failed with an unexpected error, without closing the app."""
        if event.state is WorkerState.ERROR and event.worker.error is not None:
            if event.worker is self.full_pass_worker and self.passes.running_pass is not None:
                self._end_full_pass(self.passes.running_pass)
            error = event.worker.error
            self.log.error(f"worker {event.worker.name} failed: {error!r}")
            if isinstance(error, RuntimeWarning):  # numpy's warnings are errors (cli/main.py)
                self.report_error(
                    numeric_warning_message(error),
                    title="the numbers went out of range",
                    is_background=True,
                )
                return
            self.report_error(
                f"{type(error).__name__}: {error}\n\nThis is a bug in triage; the app stays open.",
                title="unexpected error",
                is_background=True,
            )

    # ----------------------------------------------------------------------------------------
    # opening the data

    @work(thread=True, exclusive=True, group="open", exit_on_error=False)
    def open_data(self, path: str) -> None:
        """Open the source and profile its columns on a small sample (thread worker)."""
        settings = self.settings
        try:
            opened = None if self.head_start is None else self.head_start.take_opened(path)
            if opened is None:
                opened = open_and_profile(path, csv=settings.csv, seed=settings.seed)
            elif self.head_start is not None and self.head_start.plan_failure:
                self.notify(self.head_start.plan_failure, severity="warning")
        except TriageError as error:
            self.post_message(PassFailed(0, str(error), "cannot open the data"))
            return
        self.post_message(SourceOpened(opened.source, opened.profile))

    def action_open_data(self) -> None:
        """Ask for another data source; once it opens, a new session starts on it."""

        def apply(path: str | None) -> None:
            if path and path.strip():
                self.open_data(path.strip())

        self.app.push_screen(
            PromptScreen(
                "open data (Parquet file, folder or glob; CSV; Arrow IPC); "
                "this starts a new session",
                placeholder="sample_parquet/deliveries.parquet",
            ),
            apply,
        )

    def on_source_opened(self, message: SourceOpened) -> None:
        """Show the columns, and fit at once when the command line gave a target.

        When this screen already has data, the new source starts a fresh session on a new
        main screen (fits, marks and rows of the old file do not carry over).
        """
        if self.source is not None:
            fresh = replace(
                self.settings,
                data=str(message.source.path),
                target=None,
                terms="",
                weights=None,
                where=None,
                categorical=(),
                show=(),
                is_full_at_start=False,
            )
            self.app.switch_screen(MainScreen(fresh, opened=message))
            return
        self.source = message.source
        self._text_facts = {}
        self.segment_columns = segment_columns(message.source.schema(), message.profile)
        schema = message.source.schema()
        unknown = [name for name in self.settings.show if name not in schema]
        if unknown:
            self.notify(f"--show: no column {', '.join(f'`{n}`' for n in unknown)} in this data")
        self.query_one(WorstPane).show_columns(
            tuple(name for name in self.settings.show if name in schema)
        )
        columns = self.query_one(ColumnsPane)
        columns.profile = message.profile
        if self.settings.terms:
            try:
                self.draft = self.draft.with_terms_text(self.settings.terms)
            except TriageError as error:
                self.show_error(str(error), title="bad terms")
        columns.draft = self.draft
        self._update_model_line()
        self.refresh_bindings()
        if self.front == "columns":
            columns.focus_target().focus()
        if self.draft.target is not None:
            self.start_pass(is_full=False)
            if self.settings.is_full_at_start:
                self.start_pass(is_full=True)

    # ----------------------------------------------------------------------------------------
    # building the model

    def _cursor_column(self) -> str | None:
        return self.query_one(ColumnsPane).cursor_column()

    def _set_draft(self, draft: ModelDraft) -> None:
        """Keep a changed model, show it, and fit it on the sample when it has a target.

        A model with a target is checked against the columns first; when it does not fit the
        data the message says why and the previous model stays.
        """
        if draft.target is not None:
            spec = self._spec(draft)
            if spec is None:
                return
            draft = draft.with_levels_read(spec)
        self.is_opening_on_fit = False  # the user builds the model: the Columns pane stays
        self.draft = draft
        self.typed_terms = None
        self.query_one(ColumnsPane).draft = draft
        self._update_model_line()
        if draft.target is not None:
            self.start_pass(is_full=False)

    def _update_model_line(self) -> None:
        """Name the fit on screen in the heading; before the first fit, the model being built."""
        line = self.query_one(ModelLine)
        if self.passes.pending is not None:
            line.label = self.passes.pending[1]
        else:
            line.label = None if self.current is None else self.current.label
        if self.draft.target is None and not self.draft.terms:
            line.text = "no model yet: choose a target column in Columns"
            return
        parts = [self.draft.formula()]
        if self.draft.weights:
            parts.append(f"weights {self.draft.weights}")
        if self.draft.where:
            parts.append(f"where {self.draft.where}")
        if self.draft.categorical:
            parts.append("categorical " + ", ".join(self.draft.categorical))
        self.query_one(ModelLine).text = "  |  ".join(parts)

    def action_set_target(self) -> None:
        """Make the column under the cursor the target."""
        column = self._cursor_column()
        if column is not None:
            self._set_draft(self.draft.with_target(column))

    def action_toggle_term(self) -> None:
        """Add or remove the term on the column under the cursor."""
        column = self._cursor_column()
        if column is not None:
            self._set_draft(self.draft.with_term_toggled(column))

    def action_cycle_transform(self) -> None:
        """Step the transform of the term on the column under the cursor."""
        column = self._cursor_column()
        if column is not None:
            self._set_draft(self.draft.with_transform_cycled(column))

    def action_toggle_categorical(self) -> None:
        """Mark or unmark the column under the cursor as categorical."""
        column = self._cursor_column()
        if column is not None:
            self._set_draft(self.draft.with_categorical_toggled(column))

    def action_set_weights(self) -> None:
        """Use the column under the cursor as weights, or stop."""
        column = self._cursor_column()
        if column is not None:
            self._set_draft(self.draft.with_weights_toggled(column))

    def action_toggle_shown(self) -> None:
        """Show the column under the cursor beside each worst row, or stop (two at most)."""
        column = self._cursor_column()
        worst = self.query_one(WorstPane)
        if column is None:
            return
        names = list(worst.shown_columns)
        if column in names:
            names.remove(column)
        elif len(names) >= MAX_SHOWN:
            self.notify(
                f"at most {MAX_SHOWN} columns show in Worst: press the key on one to drop it"
            )
            return
        else:
            names.append(column)
        worst.show_columns(tuple(names))

    def action_edit_filter(self) -> None:
        """Ask for a row filter."""

        def apply(text: str | None) -> None:
            if text is None:
                return
            where = text.strip() or None
            self._set_draft(replace(self.draft, where=where))

        self.app.push_screen(
            PromptScreen(
                "keep rows where (SQL expression; empty keeps every row)",
                value=self.draft.where or "",
                placeholder="depot = 'north' AND hour < 20",
            ),
            apply,
        )

    def action_edit_terms(self) -> None:
        """Ask for the terms in the term syntax."""

        def apply(text: str | None) -> None:
            if text is None:
                return
            self.typed_terms = text
            try:
                draft = self.draft.with_terms_text(text)
            except TriageError as error:
                self.show_error(str(error), title="bad terms")
                return
            self._set_draft(draft)

        self.app.push_screen(
            PromptScreen(
                "terms (comma list, or target ~ a + b)",
                value=self.typed_terms or self.draft.terms_text(),
                placeholder="distance_km, log(stops), depot, stops:weight_kg",
            ),
            apply,
        )

    @on(DataTable.RowSelected, "#columns-table")
    def _column_chosen(self) -> None:
        """Enter on a column toggles its term."""
        self.action_toggle_term()

    # ----------------------------------------------------------------------------------------
    # passes

    def _text_column_facts(self, column: str) -> TextColumnFacts:
        """Read a text column of the source once, to tell numbers with a stray value from text."""
        from triage.data.text_columns import text_column_facts

        assert self.source is not None  # asked only while a source is open
        if column not in self._text_facts:
            self._text_facts[column] = text_column_facts(self.source, column)
        return self._text_facts[column]

    def _spec(self, draft: ModelDraft | None = None) -> ModelSpec | None:
        """Check a draft (the current one by default) against the data; say what is wrong."""
        if self.source is None:
            return None
        try:
            return (draft or self.draft).to_spec(
                self.source.schema(), self.settings, self._text_column_facts
            )
        except TriageError as error:
            self.show_error(str(error), title="the model cannot be fitted")
            return None

    def action_quick_fit(self) -> None:
        """Fit on a sample now."""
        self.start_pass(is_full=False)

    def action_start_full_pass(self) -> None:
        """Fit and diagnose on every row in the background."""
        self.start_pass(is_full=True)

    def start_pass(
        self, *, is_full: bool, excluded: frozenset[int] = frozenset(), baseline: int | None = None
    ) -> None:
        """Start a sample fit or a full pass on the current model.

        Parameters
        ----------
        is_full : bool
            Read every row (background, with progress and cancel) instead of the sample.
        excluded : frozenset of int
            Source positions to leave out (a what-if refit).
        baseline : int, optional
            Number of the fit a what-if refit is compared with.
        """
        spec = self._spec()
        if spec is None:
            return
        current = self.current
        if (
            is_full
            and current is not None
            and current.is_full_pass
            and current.report.outcome.spec == spec
            and current.excluded == excluded
        ):
            self.notify(f"fit #{current.number} already uses every row")
            return
        job, replaced = self.passes.start(spec, excluded, baseline, is_full=is_full)
        if is_full:
            if replaced is not None:
                from triage.views.text import model_formula

                self.notify(
                    f"the pass over every row of {model_formula(replaced.spec)} was stopped: "
                    "a new pass over every row started",
                    severity="warning",
                )
            self.full_pass_worker = self.run_full_pass(job)
            pass_line = self.query_one(PassLine)
            pass_line.pass_label = "every row"
            pass_line.set_class(True, "-running")
            self.notify("reading every row in the background; the sample results stay until done")
        else:
            self.run_sample_fit(job)
            self._running_pass_gives_way()
        self.refresh_bindings()

    def _running_pass_gives_way(self) -> None:
        """Say that a running full pass no longer takes the screen when it ends.

        The model, filter, weights or marks changed (or another fit was chosen) while it ran:
        it goes on, and its fit joins the Fits list as a fit of its own.
        """
        job = self.passes.lost_screen()
        if job is None:
            return
        pass_line = self.query_one(PassLine)
        if pass_line.pass_label != "every row":
            return
        from triage.views.text import model_formula

        pass_line.pass_label = "every row (to Fits)"
        self.notify(
            f"the pass over every row of {model_formula(job.spec)} goes on; its fit will join "
            "Fits (0) without replacing the one on screen (x stops it)",
            timeout=8,
        )

    def _run_pass(self, job: PassJob, *, rows: RowsToRead) -> None:
        """Run one pass of `job` in the current thread worker and post how it ended."""
        assert self.source is not None
        run_pass(
            job,
            rows=rows,
            source=self.source,
            settings=self.settings,
            segment_columns=self.segment_columns,
            head_start=self.head_start,
            engine=self._cluster_engine() if rows is ALL_ROWS else None,
            post=self.post_message,
        )

    def _cluster_engine(self) -> ClusterEngine | None:
        """Return the cluster engine of `Settings.scheduler` (it connects on its first pass)."""
        if self.settings.scheduler is None:
            return None
        if self.cluster is None:
            from triage.engine.cluster import ClusterEngine

            self.cluster = ClusterEngine(self.settings.scheduler)
        return self.cluster

    def on_unmount(self) -> None:
        """Close the connection to the cluster, if a pass opened one (the cluster runs on)."""
        if self.cluster is not None:
            self.cluster.close()

    @work(thread=True, exclusive=True, group="sample-fit", exit_on_error=False)
    def run_sample_fit(self, job: PassJob) -> None:
        """Fit and diagnose on the sample (thread worker; a newer request cancels it)."""
        self._run_pass(job, rows=self.settings.sample_rows)

    @work(thread=True, exclusive=True, group="full-pass", exit_on_error=False)
    def run_full_pass(self, job: PassJob) -> None:
        """Fit and diagnose on every row (thread worker; the cancel key stops it)."""
        self._run_pass(job, rows=ALL_ROWS)

    def action_cancel_pass(self) -> None:
        """Stop the running full pass; the results on screen stay."""
        if self.full_pass_worker is not None:
            self.full_pass_worker.cancel()

    def on_key(self, event: events.Key) -> None:
        """Say why a greyed-out key does nothing, where a word helps."""
        active = self.app.active_bindings.get(event.key)
        if active is None or active.enabled:
            return
        if active.binding.action == "cancel_pass":
            self.notify("no pass over every row is running; nothing to stop")

    def on_pass_progressed(self, message: PassProgressed) -> None:
        """Show the progress of the running full pass."""
        if message.pass_id == self.passes.running_pass:
            self.query_one(PassLine).progress = message.progress

    def _end_full_pass(self, pass_id: int) -> bool:
        """Forget the running full pass if it is `pass_id`; return True if it was."""
        if not self.passes.end_full_pass(pass_id):
            return False
        self._show_full_pass_ended()
        return True

    def _show_full_pass_ended(self) -> None:
        self.full_pass_worker = None
        pass_line = self.query_one(PassLine)
        pass_line.progress = None
        pass_line.pass_label = "every row"
        self.refresh_bindings()

    def _end_pass(self, pass_id: int) -> None:
        """Forget a pass that ended without a fit: its number, and its fit shown early."""
        if self.passes.end_pass(pass_id):
            self.query_one(FitPane).drop_provisional()
            if self.current is not None:
                self.show_fit(self.current)
            else:
                self._show_basis()
                self._update_model_line()

    def on_pass_stopped(self, message: PassStopped) -> None:
        """Say that the full pass stopped and what stays on screen."""
        self._end_pass(message.pass_id)
        if self._end_full_pass(message.pass_id):
            self.notify(
                "the pass over every row was stopped; the results on screen are unchanged",
                severity="warning",
            )

    def on_pass_failed(self, message: PassFailed) -> None:
        """Show why a pass (or opening the data) failed."""
        self.is_opening_on_fit = False
        self._end_pass(message.pass_id)
        self._end_full_pass(message.pass_id)
        self.report_error(message.message, title=message.title, is_background=message.pass_id != 0)

    def _show_basis(self) -> None:
        """Say on the pass line which rows the fit on screen comes from."""
        fit = self.current
        self.query_one(PassLine).basis = (
            "no fit yet"
            if fit is None
            else basis_text(fit.number, fit.report.outcome.data, excluded=bool(fit.excluded))
        )

    def on_fit_computed(self, message: FitComputed) -> None:
        """Show a sample fit at once, while its residual diagnostics are still computed.

        The fit takes its number now, and the heading names it; the panes that need the
        diagnostics show nothing of the previous fit meanwhile.
        """
        outcome = message.outcome
        label = self.passes.show_early(message.pass_id, outcome)
        if label is None:
            return
        number = label.number
        self.query_one(FitPane).show_provisional(outcome, number)
        self.query_one(SpreadPane).shown = None
        self.query_one(TrendPane).shown = None
        self.query_one(InputsPane).shown = None
        self.query_one(FlagsPane).shown = None
        self.query_one(GroupsPane).shown = None
        self.query_one(WorstPane).show_pending(number)
        if self.row_position is not None:
            self.query_one(RowPane).row = RowView(
                self.row_position,
                None,
                None,
                is_marked=self.row_position in self.marked,
                fit_number=number,
            )
        basis = basis_text(number, outcome.data, excluded=bool(outcome.data.rows_excluded))
        self.query_one(PassLine).basis = f"{basis}; residual diagnostics running"
        self._update_model_line()
        self._open_on_fit()
        self.refresh_bindings()

    def on_pass_finished(self, message: PassFinished) -> None:
        """Add the fit to the session's list; show it when it is the one the screen awaits.

        A full pass whose model was changed while it ran joins the list without taking the
        screen; a late sample fit of an older request is dropped.
        """
        ended = self.passes.finish(message.pass_id)
        if ended is None:
            self._end_pass(message.pass_id)
            return
        if ended.is_full:
            self._show_full_pass_ended()
        fit = SessionFit(
            number=ended.number,
            report=message.report,
            excluded=message.excluded,
            baseline=message.baseline,
        )
        self.fits.append(fit)
        self.fits.sort(key=lambda kept: kept.number)  # a pass bound for Fits may end first
        self.query_one(ColumnsPane).refresh_figures(message.report.outcome.column_figures)
        fits_pane = self.query_one(FitsPane)
        fits_pane.fits = tuple(self.fits)
        if ended.takes_screen:
            self.show_fit(fit)
            if ended.is_full:
                self.notify(f"fit #{fit.number} now uses every row")
        else:
            shown = "" if self.current is None else f"; fit #{self.current.number} stays on screen"
            self.notify(
                f"fit #{fit.number} ({fit.label.formula}, every row) joined Fits (0){shown}",
                timeout=10,
            )
            if self.current is not None:
                fits_pane.comparison = compare_session_fits(self.fits, self.current)
        if len(self.fits) == 1:
            collect_again()

    def fit_numbered(self, number: int) -> SessionFit | None:
        """Return the session's fit with that number, if there is one."""
        return next((fit for fit in self.fits if fit.number == number), None)

    def _open_on_fit(self) -> None:
        """Bring the Fit pane forward for the first fit of a model the command line named."""
        if self.is_opening_on_fit:
            self.is_opening_on_fit = False
            if self.front == "columns":
                self.action_show_pane("fit")

    def show_fit(self, fit: SessionFit) -> None:
        """Push one fit of the session down to every pane, and name it in the heading."""
        self.current = fit
        self.passes.pending = None
        outcome = fit.report.outcome
        predictors = outcome.builder.numeric_predictors
        self.predictor_index %= max(len(predictors), 1)
        baseline = None if fit.baseline is None else self.fit_numbered(fit.baseline)
        self.query_one(FitPane).set_fit(fit, baseline, robust=self.is_robust)
        self.query_one(SpreadPane).shown = fit
        self.query_one(TrendPane).shown = fit
        predictors_pane = self.query_one(InputsPane)
        predictors_pane.predictor = predictors[self.predictor_index] if predictors else None
        predictors_pane.shown = fit
        self.query_one(FlagsPane).shown = fit
        worst = self.query_one(WorstPane)
        worst.marked = frozenset(self.marked)
        worst.show(fit, self._criterion())
        self.query_one(RowPane).decimals = worst.decimals
        segments = self.query_one(GroupsPane)
        columns = self.segment_columns
        segments.column = columns[self.segment_index % len(columns)] if columns else None
        segments.shown = fit
        fits_pane = self.query_one(FitsPane)
        fits_pane.current = fit.number
        fits_pane.comparison = compare_session_fits(self.fits, fit)
        self.row_cache.keep_fit(fit.number)
        self.prefetch_rows(self._worst_positions(), fit)
        if self.row_position is not None:
            self.show_row(self.row_position)
        self._show_basis()
        self._update_model_line()
        # on the pass line itself: a class on the screen would restyle every widget
        pass_line = self.query_one(PassLine)
        pass_line.set_class(fit.is_full_pass, "-every-row")
        pass_line.set_class(not fit.is_full_pass, "-from-sample")
        self._open_on_fit()
        self.refresh_bindings()

    @on(DataTable.RowSelected, "#fits-table")
    def _fit_chosen(self, event: DataTable.RowSelected) -> None:
        """Enter on a fit of the list shows it again, whole, and editing starts from its model.

        A sample fit still running for another model is stopped; a full pass goes on and
        joins the list when it ends.
        """
        fit = self.fit_numbered(int(str(event.row_key.value)))
        if fit is None:
            return
        self.workers.cancel_group(self, "sample-fit")
        self.passes.release_screen()
        self.draft = draft_from_spec(fit.report.outcome.spec)
        self.typed_terms = None
        self.query_one(ColumnsPane).draft = self.draft
        self.show_fit(fit)
        self._running_pass_gives_way()

    # ----------------------------------------------------------------------------------------
    # pane options

    def _criterion(self) -> Criterion:
        return CRITERIA[self.criterion_index % len(CRITERIA)]

    def action_toggle_robust(self) -> None:
        """Switch the coefficient table between usual and robust (HC3) standard errors."""
        self.is_robust = not self.is_robust
        if self.current is not None:
            self.show_fit(self.current)

    def action_toggle_quantile_chart(self) -> None:
        """Switch the Spread pane between histogram and quantile chart; bring it forward.

        From a pane where Spread is not in view, the quantile chart comes forward.
        """
        spread = self.query_one(SpreadPane)
        if spread.has_class("-shown"):
            spread.is_quantile_chart = not spread.is_quantile_chart
        else:
            spread.is_quantile_chart = True
            self.action_show_pane("spread")

    def action_next_predictor(self) -> None:
        """Show residuals against the next numeric predictor."""
        self.predictor_index += 1
        if self.current is not None:
            self.show_fit(self.current)

    def action_next_criterion(self) -> None:
        """Rank the worst rows by the next criterion."""
        self.criterion_index += 1
        if self.current is not None:
            self.query_one(WorstPane).show(self.current, self._criterion())
            self.prefetch_rows(self._worst_positions(), self.current)

    def action_next_segment_column(self) -> None:
        """Break residuals down by the next column."""
        self.segment_index += 1
        if self.current is not None:
            self.show_fit(self.current)

    # ----------------------------------------------------------------------------------------
    # rows: drill-down, marks, what-if, export

    def _worst_positions(self) -> list[int]:
        return self.query_one(WorstPane).positions()

    def action_open_row(self) -> None:
        """Open the row under the cursor of the Worst pane in the Row pane."""
        position = self.query_one(WorstPane).cursor_position()
        if position is not None:
            self.open_row(position)

    @on(DataTable.RowSelected, "#worst-table")
    def _worst_chosen(self) -> None:
        """Enter on a worst row opens it."""
        self.action_open_row()

    @on(DataTable.RowHighlighted, "#worst-table")
    def _worst_moved(self) -> None:
        """With Worst and Row tiled side by side, the Row pane follows the Worst cursor."""
        position = self.query_one(WorstPane).cursor_position()
        if self.is_tiled and self.front == "worst" and position not in (None, self.row_position):
            self.show_row(position)

    def action_step_row(self, step: int) -> None:
        """Open the next (1) or previous (-1) row of the worst-rows list."""
        positions = self._worst_positions()
        if not positions:
            return
        if self.row_position in positions:
            index = (positions.index(self.row_position) + step) % len(positions)
        else:
            index = 0 if step > 0 else len(positions) - 1
        self.query_one(WorstPane).move_to(positions[index])
        self.open_row(positions[index])

    def open_row(self, position: int) -> None:
        """Show a row in the Row pane and bring the pane forward."""
        self.show_row(position)
        if self.front != "row" and (not self.is_tiled or PANE_BY_ID[self.front].page != "rows"):
            self.action_show_pane("row")

    def show_row(self, position: int) -> None:
        """Show a row under the fit on screen, at once from the cache or read in the background."""
        self.row_position = position
        fit = self.current
        if fit is None:
            return
        row_pane = self.query_one(RowPane)
        is_marked = position in self.marked
        cached = self.row_cache.get(position, fit.number)
        if cached is not None:
            row_pane.row = replace(cached, is_marked=is_marked)
        else:
            row_pane.row = RowView(position, None, None, is_marked, fit.number)
            self.fetch_row(position, fit)

    @work(thread=True, exclusive=True, group="row-fetch", exit_on_error=False)
    def fetch_row(self, position: int, fit: SessionFit) -> None:
        """Read the whole original row by position and diagnose it (thread worker)."""
        assert self.source is not None
        read_row(self.source, fit, position, self.post_message)

    def action_run_checks(self) -> None:
        """Run the robust refit and the curvature check on the fit on screen."""
        if self.current is None:
            self.notify("no fit yet: fit a model first")
            return
        self.notify(f"checking fit #{self.current.number} on the sample…")
        self.checking = self.current.number
        self.run_checks(self.current)

    @work(thread=True, exclusive=True, group="checks", exit_on_error=False)
    def run_checks(self, fit: SessionFit) -> None:
        """Refit `fit` by Huber's method and with splines, on the sample (thread worker)."""
        width = max(self.app.size.width - 6, 60)  # the text dialog spans the screen
        check_fit(fit, seed=self.settings.seed, width=width, post=self.post_message)

    def on_checks_finished(self, message: ChecksFinished) -> None:
        """Keep the checks' results and say they are ready; they open only when asked."""
        self.checks[message.number] = message.text
        if self.checking == message.number:
            self.checking = None
        key = self.key_displays().get("show-checks", "")
        self.notify(f"the checks of fit #{message.number} are ready: {key} shows them", timeout=10)

    def action_show_checks(self) -> None:
        """Show the finished checks of the fit on screen on a page of their own."""
        if self.current is None:
            return
        number = self.current.number
        text = self.checks.get(number)
        if text is not None:
            self.app.push_screen(TextScreen(text, title=f"checks of fit #{number}"))
        elif self.checking == number:
            self.notify(f"the checks of fit #{number} are still running")
        else:
            key = self.key_displays().get("run-checks", "")
            self.notify(f"fit #{number} has not been checked yet: {key} runs the checks")

    @work(thread=True, exclusive=True, group="row-prefetch", exit_on_error=False)
    def prefetch_rows(self, positions: list[int], fit: SessionFit) -> None:
        """Read the listed worst rows ahead, in one pass over their row groups (thread worker)."""
        wanted = self.row_cache.missing(positions)
        if self.source is not None and wanted:
            read_rows_ahead(self.source, fit, wanted, self.post_message)

    def on_rows_fetched(self, message: RowsFetched) -> None:
        """Fill the Row pane when the row it waits for arrives; cache it.

        Rows diagnosed under a fit that is no longer on screen are dropped.
        """
        fit = self.current
        if fit is None or self.passes.pending is not None or message.fit_number != fit.number:
            return
        view = RowView(
            message.position,
            message.frame,
            message.diagnostics,
            is_marked=message.position in self.marked,
            fit_number=fit.number,
        )
        self.row_cache.add(view)
        if message.frame is not None and message.frame.height:
            self.query_one(WorstPane).add_record(message.position, message.frame.row(0, named=True))
        if message.position == self.row_position:
            self.query_one(RowPane).row = view

    def _focused_position(self) -> int | None:
        if self.front == "row" or (self.front != "worst" and self.row_position is not None):
            return self.row_position
        return self.query_one(WorstPane).cursor_position()

    def action_toggle_mark(self) -> None:
        """Mark or unmark the row under the cursor in Worst, or the row open in Row."""
        if self.front not in ("worst", "row"):
            self.notify("rows are marked in Worst or Row: bring one of them to the front first")
            return
        position = self._focused_position()
        if position is None:
            return
        self.marked.symmetric_difference_update({position})
        self._marks_changed()

    def action_clear_marks(self) -> None:
        """Unmark every row."""
        self.marked.clear()
        self._marks_changed()

    def _marks_changed(self) -> None:
        self.query_one(WorstPane).marked = frozenset(self.marked)
        row_pane = self.query_one(RowPane)
        if row_pane.row is not None:
            view = row_pane.row
            row_pane.row = replace(view, is_marked=view.position in self.marked)
        self.query_one(PassLine).marks = len(self.marked)

    def action_refit_without_marked(self) -> None:
        """Refit the shown model without the marked rows (the file is never changed)."""
        if self.current is None:
            return
        if not self.marked:
            self.notify("no rows are marked; mark rows in Worst or Row first", severity="warning")
            return
        self.start_pass(
            is_full=self.current.is_full_pass,
            excluded=frozenset(self.marked) | self.current.excluded,
            baseline=self.current.number,
        )

    def action_export_rows(self) -> None:
        """Ask what to export and where, then write it in the background.

        The rows are scored by the fit on screen when the key is pressed, whatever shows
        by the time the dialog closes.
        """
        fit = self.current
        if fit is None:
            return
        worst = self.query_one(WorstPane).positions()

        def chosen(request: ExportRequest | None) -> None:
            if request is None:
                return
            positions = sorted(self.marked) if request.what == "marked" else worst[: request.k]
            if not positions:
                self.show_error(
                    "there are no rows to export: mark rows first", title="nothing to export"
                )
                return
            self.write_export(fit, positions, request)

        self.app.push_screen(
            ExportScreen(
                n_marked=len(self.marked),
                criterion=self._criterion(),
                top_k=self.settings.top_k,
                basis=fit.label.one_line(),
            ),
            chosen,
        )

    @work(thread=True, exclusive=True, group="export", exit_on_error=False)
    def write_export(self, fit: SessionFit, positions: list[int], request: ExportRequest) -> None:
        """Write the rows with every column plus diagnostics (thread worker)."""
        assert self.source is not None
        write_rows(self.source, fit, positions, request, self.post_message)

    def on_export_written(self, message: ExportWritten) -> None:
        """Say where the rows went, with the reminder about personal records."""
        from triage.data.export import PERSONAL_DATA_NOTICE

        self.notify(
            f"wrote {message.n_rows:,} rows scored by fit #{message.fit_number} to "
            f"{message.path}\n{PERSONAL_DATA_NOTICE}",
            timeout=12,
        )
