"""Small modal screens: an error the user dismisses, a one-line prompt, a page of text."""

from __future__ import annotations

from typing import ClassVar

from textual.app import ComposeResult
from textual.binding import Binding, BindingType
from textual.containers import Vertical, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Input, Static

CLOSE_DIALOG = Binding(
    "escape",
    "close_dialog",
    "close",
    id="close-dialog",
    tooltip="Close this dialog without doing anything more.",
)
"""The one key that closes every dialog (help, error, prompt, export)."""


class ErrorScreen(ModalScreen[None]):
    """Shows an error message until the user dismisses it."""

    BINDINGS: ClassVar[list[BindingType]] = [
        CLOSE_DIALOG,
        Binding(
            "enter",
            "close_dialog",
            "dismiss",
            id="dismiss-error",
            tooltip="Dismiss the message and go back.",
        ),
    ]

    def __init__(self, message: str, *, title: str = "something went wrong") -> None:
        super().__init__()
        self.message = message
        """The error text, shown as given."""
        self.title_text = title
        """Short heading above the message."""

    def compose(self) -> ComposeResult:
        """Lay out the heading, the message and how to dismiss it."""
        with Vertical(classes="dialog dialog--error"):
            yield Static(self.title_text, classes="dialog--title", markup=False)
            yield Static(self.message, id="error-message", markup=False)
            yield Static("", id="error-keys", classes="dialog--keys", markup=False)

    def on_mount(self) -> None:
        """Name the dismiss keys as the active keymap has them."""
        keys = self.app.active_bindings
        shown = sorted(
            {
                self.app.get_key_display(b.binding)
                for b in keys.values()
                if b.binding.action == "close_dialog"
            }
        )
        self.query_one("#error-keys", Static).update(" or ".join(shown) + ": dismiss")

    def action_close_dialog(self) -> None:
        """Close the message."""
        self.dismiss(None)


class PromptScreen(ModalScreen[str | None]):
    """Asks for one line of text; returns it, or None when closed."""

    BINDINGS: ClassVar[list[BindingType]] = [CLOSE_DIALOG]

    def __init__(self, question: str, *, value: str = "", placeholder: str = "") -> None:
        super().__init__()
        self.question = question
        """What to type, shown above the field."""
        self.value = value
        """Text the field starts with."""
        self.placeholder = placeholder
        """Example shown while the field is empty."""

    def compose(self) -> ComposeResult:
        """Lay out the question and the field."""
        with Vertical(classes="dialog"):
            yield Static(self.question, classes="dialog--title", markup=False)
            # the cursor at the end, nothing selected: typing adds to the text, as when one
            # more term is added to a model, instead of replacing it all
            yield Input(
                self.value, placeholder=self.placeholder, id="prompt-input", select_on_focus=False
            )
            yield Static("enter: apply   escape: close", classes="dialog--keys", markup=False)

    def on_mount(self) -> None:
        """Put the cursor in the field, without blinking (it redraws over a slow link)."""
        field = self.query_one("#prompt-input", Input)
        field.cursor_blink = False
        field.focus()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        """Return the typed text when enter is pressed."""
        event.stop()
        self.dismiss(event.value)

    def action_close_dialog(self) -> None:
        """Close without changing anything."""
        self.dismiss(None)


class TextScreen(ModalScreen[None]):
    """Shows a page of plain text (a check's result) until the user closes it."""

    BINDINGS: ClassVar[list[BindingType]] = [CLOSE_DIALOG]

    def __init__(self, text: str, *, title: str) -> None:
        super().__init__()
        self.text = text
        """The text, shown as given (scrolls when long)."""
        self.title_text = title
        """Short heading above the text."""

    def compose(self) -> ComposeResult:
        """Lay out the heading and the scrolling text."""
        with Vertical(classes="dialog dialog--text"):
            yield Static(self.title_text, classes="dialog--title", markup=False)
            with VerticalScroll():
                yield Static(self.text, id="text-body", markup=False)
            yield Static("escape: close", classes="dialog--keys", markup=False)

    def action_close_dialog(self) -> None:
        """Close the page."""
        self.dismiss(None)
