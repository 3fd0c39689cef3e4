"""The export dialog: marked rows or the worst K, where to write them, and the reminder."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar, Literal

from textual.app import ComposeResult
from textual.binding import BindingType
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Checkbox, Input, RadioButton, RadioSet, Static

from triage.tui.screens.dialogs import CLOSE_DIALOG


@dataclass(frozen=True)
class ExportRequest:
    """What the user asked to export."""

    what: Literal["marked", "worst"]
    """The marked rows, or the first `k` rows of the worst-rows list on screen."""
    k: int
    """How many worst rows (ignored for marked rows)."""
    path: str
    """Output file: `.parquet`, `.pq`, `.csv` or `.tsv`."""
    is_replacing: bool
    """Replace the file if it exists (never an input file of the session)."""


class MarkedCheckbox(Checkbox):
    """A check box whose state shows in characters (X or blank), not in colour alone."""

    def on_mount(self) -> None:
        """Draw the initial state (without announcing a change)."""
        self.BUTTON_INNER = "X" if self.value else " "

    def watch_value(self) -> None:
        """Draw X when on and a blank when off (NO_COLOR leaves no other difference)."""
        super().watch_value()
        self.BUTTON_INNER = "X" if self.value else " "


class MarkedRadioButton(RadioButton):
    """A radio button whose state shows in characters (● or blank), not in colour alone."""

    def on_mount(self) -> None:
        """Draw the initial state (without announcing a change)."""
        self.BUTTON_INNER = "●" if self.value else " "

    def watch_value(self) -> None:
        """Draw ● when chosen and a blank otherwise."""
        super().watch_value()
        self.BUTTON_INNER = "●" if self.value else " "


class ExportScreen(ModalScreen[ExportRequest | None]):
    """Asks which rows to export and where; enter in the file field confirms."""

    BINDINGS: ClassVar[list[BindingType]] = [CLOSE_DIALOG]

    def __init__(self, *, n_marked: int, criterion: str, top_k: int, basis: str) -> None:
        super().__init__()
        self.basis = basis
        """Which fit scores the rows (written into the file's note too)."""
        self.n_marked = n_marked
        """Rows marked now."""
        self.criterion = criterion
        """Ranking of the worst-rows list on screen."""
        self.top_k = top_k
        """Rows the worst-rows list holds."""

    def compose(self) -> ComposeResult:
        """Lay out the choice, the count, the file field and the reminder."""
        from triage.data.export import PERSONAL_DATA_NOTICE
        from triage.views.text import CRITERION_TITLES

        ranking = CRITERION_TITLES.get(self.criterion, self.criterion)
        with Vertical(classes="dialog"):
            yield Static(
                "export rows (all original columns plus diagnostics)",
                classes="dialog--title",
                markup=False,
            )
            yield Static(f"scored by {self.basis}", id="export-basis", markup=False)
            with RadioSet(id="export-what"):
                yield MarkedRadioButton(
                    f"marked rows ({self.n_marked:,})", value=self.n_marked > 0, id="export-marked"
                )
                yield MarkedRadioButton(
                    f"worst K rows: {ranking}", value=self.n_marked == 0, id="export-worst"
                )
            yield Input(
                str(min(20, self.top_k)),
                id="export-k",
                type="integer",
                placeholder=f"K, at most {self.top_k}",
            )
            yield Input("", id="export-path", placeholder="rows.parquet or rows.csv")
            yield MarkedCheckbox("replace the file if it exists", value=False, id="export-replace")
            yield Static(f"note: {PERSONAL_DATA_NOTICE}", id="export-notice", markup=False)
            yield Static(
                "tab: next field   enter in the file field: write   escape: close",
                classes="dialog--keys",
                markup=False,
            )

    def on_mount(self) -> None:
        """Start in the file field, without a blinking cursor."""
        for field in self.query(Input):
            field.cursor_blink = False
        self.query_one("#export-path", Input).focus()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        """Confirm when enter is pressed in the file field with a path typed."""
        event.stop()
        path = self.query_one("#export-path", Input).value.strip()
        if not path:
            self.query_one("#export-path", Input).focus()
            return
        is_marked = self.query_one("#export-marked", RadioButton).value
        k_text = self.query_one("#export-k", Input).value.strip()
        k = max(1, min(self.top_k, int(k_text))) if k_text.isdigit() else self.top_k
        is_replacing = self.query_one("#export-replace", Checkbox).value
        self.dismiss(ExportRequest("marked" if is_marked else "worst", k, path, is_replacing))

    def action_close_dialog(self) -> None:
        """Close without writing anything."""
        self.dismiss(None)
