"""The help screen: every key of the active keymap, read from the live bindings."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, ClassVar, Final

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import BindingType
from textual.containers import Vertical, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Static

from triage.tui.screens.dialogs import CLOSE_DIALOG

if TYPE_CHECKING:
    from textual.app import App
    from textual.binding import ActiveBinding


def help_rows(app: App[Any], bindings: dict[str, ActiveBinding]) -> list[tuple[str, str, str]]:
    """List (keys, what it does, more) for every described binding, grouping keys per action.

    Parameters
    ----------
    app : App
        The running app (it knows how each key is displayed).
    bindings : dict of str to ActiveBinding
        `Screen.active_bindings` of the screen the help is about.

    Returns
    -------
    list of tuple of str
        One row per action, keys joined with ` / `: the app's keys, then the screen's, in
        triage's words; the framework's own entries (focus, copy, the table cursor keys)
        are described once in `MOVING`, not listed under the framework's names.
    """
    from textual.app import App
    from textual.binding import Binding
    from textual.screen import Screen

    framework = {
        (b.action, b.description) for b in Binding.make_bindings([*App.BINDINGS, *Screen.BINDINGS])
    }

    def rank(active: ActiveBinding) -> int:
        return 0 if active.node is app else 1

    rows: dict[tuple[str, str], list[str]] = {}
    tips: dict[tuple[str, str], str] = {}
    ours = [a for a in bindings.values() if a.node is app or isinstance(a.node, Screen)]
    for active in sorted(ours, key=rank):
        binding = active.binding
        framework_entry = (binding.action, binding.description) in framework
        if not binding.description or binding.system or framework_entry:
            continue
        key = (binding.action, binding.description)
        rows.setdefault(key, [])
        shown = app.get_key_display(binding)
        if shown not in rows[key]:
            rows[key].append(shown)
        tips[key] = binding.tooltip
    listed = [
        (" / ".join(keys), desc, tips[(action, desc)]) for (action, desc), keys in rows.items()
    ]
    return [*listed, *MOVING]


MOVING: Final[tuple[tuple[str, str, str], ...]] = (
    ("arrows", "move", "Move the cursor in a table, or scroll a pane's text."),
    ("pgup / pgdn", "page", "Move or scroll a page at a time; home and end go to the ends."),
    ("tab / ⇧tab", "next / previous box", "Move between the panes shown together."),
    ("enter", "choose", "Open the row or fit under the cursor."),
)
"""Keys the framework handles for us, in our words (they are not in the keymap)."""

FIGURES: Final = (
    "AIC and BIC count the estimated coefficients, the intercept included (not the error "
    "variance); compare them only between fits on the same rows. R² never falls when a "
    "term is added, so it marks no best fit."
)
"""A note on the figures, shown under the keys."""


class HelpScreen(ModalScreen[None]):
    """Every key the screen underneath answers to, with what it does."""

    BINDINGS: ClassVar[list[BindingType]] = [CLOSE_DIALOG]

    def __init__(self, rows: list[tuple[str, str, str]]) -> None:
        super().__init__()
        self.rows = rows
        """(keys, description, tooltip) per action."""

    def compose(self) -> ComposeResult:
        """Lay out the key table in a scrolling box."""
        with Vertical(classes="dialog dialog--help"):
            yield Static("keys", classes="dialog--title", markup=False)
            with VerticalScroll(id="help-scroll"):
                yield Static(self._table(), id="help-table")
            yield Static("escape: close   up/down: scroll", classes="dialog--keys", markup=False)

    def _table(self) -> Text:
        width = max((len(keys) for keys, _, _ in self.rows), default=4)
        text = Text(no_wrap=False)
        for keys, description, tooltip in self.rows:
            text.append(f"{keys:>{width}}  ", style="bold")
            text.append(description)
            if tooltip:
                text.append(f"  {tooltip}", style="dim")
            text.append("\n")
        text.append("\n" + FIGURES, style="dim")
        return text

    def on_mount(self) -> None:
        """Let the arrow keys scroll the table."""
        self.query_one("#help-scroll").focus()

    def action_close_dialog(self) -> None:
        """Close the help."""
        self.dismiss(None)
