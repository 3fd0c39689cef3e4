"""The triage terminal app: one main screen, keymaps from TOML, help built from live bindings."""

from __future__ import annotations

import asyncio
import contextlib
import os
import signal
import threading
import time
from typing import TYPE_CHECKING, ClassVar, Final

from textual.app import App
from textual.binding import Binding, BindingType

from triage.data.bus_guard import TEMPORARIES
from triage.engine.signals import HANDLED_SIGNALS
from triage.tui.commands import TriageCommands
from triage.tui.keymap import binding_ids, keymap_overrides, load_keymap
from triage.tui.screens.dialogs import ErrorScreen, PromptScreen
from triage.tui.screens.export import ExportScreen
from triage.tui.screens.help import HelpScreen, help_rows
from triage.tui.screens.main import MainScreen
from triage.tui.settings import Settings

if TYPE_CHECKING:
    from triage.tui.head_start import HeadStart


class TriageApp(App[None]):
    """Judge a least-squares fit on a big table and drill into where it fails, by keyboard."""

    CSS_PATH = "triage.tcss"
    TITLE = "triage"
    COMMANDS: ClassVar = {TriageCommands}
    BINDINGS: ClassVar[list[BindingType]] = [
        Binding(
            "ctrl+q",
            "quit",
            "quit",
            priority=True,
            id="quit",
            tooltip="Leave triage (the data files are never changed).",
        ),
        Binding(
            "question_mark",
            "show_help",
            "keys",
            id="show-help",
            tooltip="List every key of the active keymap.",
        ),
        Binding(
            "ctrl+p",
            "command_palette",
            "commands",
            show=False,
            priority=True,
            id="open-palette",
            tooltip="Search the commands by name.",
        ),
    ]

    def __init__(
        self,
        settings: Settings,
        keymap: dict[str, str] | None = None,
        *,
        head_start: HeadStart | None = None,
    ) -> None:
        super().__init__(ansi_color=settings.is_colorless)
        self.settings = settings
        """How the session was opened."""
        self.keymap = keymap or {}
        """Merged keymap (binding id -> key) applied on mount."""
        self.head_start = head_start
        """Work begun before the app started, handed to the first main screen."""
        self.close_deadline_s: float | None = None
        """Seconds the app may take to close after a signal before the process ends anyway
        (`triage open` sets it; None in tests, which run the app inside the test process)."""
        self.animation_level = "none"

    def on_mount(self) -> None:
        """Apply the keymap, stop cleanly on signals, and open the main screen."""
        self.set_keymap(keymap_overrides(self.keymap, declared_keys()))
        if threading.current_thread() is threading.main_thread():
            loop = asyncio.get_running_loop()
            for signum in HANDLED_SIGNALS:
                loop.add_signal_handler(signum, self.stop_on_signal, signum)
        self.push_screen(MainScreen(self.settings, head_start=self.head_start))

    def on_unmount(self) -> None:
        """Give the signals back to whoever handled them before the app."""
        if threading.current_thread() is threading.main_thread():
            loop = asyncio.get_running_loop()
            for signum in HANDLED_SIGNALS:
                loop.remove_signal_handler(signum)

    def stop_on_signal(self, signum: int) -> None:
        """Stop every pass (each within one batch) and close the app, restoring the terminal.

        SIGINT (`kill -INT`; ctrl+c is a key here), SIGTERM and SIGHUP (a closed SSH session)
        end the app with exit code 128 plus the signal's number and one line on stderr. An
        export being written finishes before the process ends; a pass is dropped.
        """
        self.workers.cancel_all()
        name = signal.Signals(signum).name
        if self.close_deadline_s is not None:
            threading.Thread(
                target=_end_if_still_closing,
                args=(signum, self.close_deadline_s),
                name="triage-close-deadline",
                daemon=True,
            ).start()
        self.exit(
            return_code=128 + signum,
            message=f"triage: stopped by {name}; the app closed and left no partial file",
        )

    def action_show_help(self) -> None:
        """Show every key the screen in front answers to, then the keys of the dialogs."""
        if isinstance(self.screen, HelpScreen):
            return
        rows = help_rows(self, self.screen.active_bindings)
        shown = {active.binding.id for active in self.screen.active_bindings.values()}
        for screen_type in (ErrorScreen, PromptScreen, ExportScreen, HelpScreen):
            for binding in screen_type.BINDINGS:
                if not isinstance(binding, Binding) or binding.id in shown:
                    continue
                shown.add(binding.id)
                key = self.keymap.get(binding.id or "", binding.key)
                display = " / ".join(
                    self.get_key_display(binding.with_key(k.strip())) for k in key.split(",")
                )
                rows.append((display, f"{binding.description} (in dialogs)", binding.tooltip))
        self.push_screen(HelpScreen(rows))


BINDING_OWNERS: Final = (TriageApp, MainScreen, HelpScreen, ErrorScreen, PromptScreen, ExportScreen)
"""The app and its screens: the classes whose bindings a keymap may name."""


def _end_if_still_closing(signum: int, deadline_s: float) -> None:
    """End the process `deadline_s` after a signal if the app has not closed by then.

    After SIGHUP the terminal is gone, and Textual's writer thread can stop on a write to it
    while the app waits for it to drain its queue: seen here, an app whose tmux session was
    killed still waited 45 minutes later, holding its memory. Temporary export files are
    removed first, so nothing partial is left.
    """
    time.sleep(deadline_s)
    for temporary in list(TEMPORARIES):
        temporary.unlink(missing_ok=True)
    name = signal.Signals(signum).name
    line = f"triage: stopped by {name}; the app could not close in time and was ended\n"
    with contextlib.suppress(OSError):
        os.write(2, line.encode())
    os._exit(128 + signum)


def all_binding_ids() -> tuple[str, ...]:
    """Return the id of every binding of the app and its screens (what a keymap may name)."""
    return tuple(dict.fromkeys(i for cls in BINDING_OWNERS for i in binding_ids(cls.BINDINGS)))


def declared_keys() -> dict[str, str]:
    """Return the keys each binding of the app and its screens is declared with, by id."""
    return {
        binding.id: binding.key
        for cls in BINDING_OWNERS
        for binding in cls.BINDINGS
        if isinstance(binding, Binding) and binding.id is not None
    }


def make_app(settings: Settings, *, head_start: HeadStart | None = None) -> TriageApp:
    """Build the app as the command line does: settings plus the merged keymap.

    Parameters
    ----------
    settings : Settings
        Data, model, sample and keymap choices.
    head_start : HeadStart, optional
        Work on the same settings begun before the app was built.

    Returns
    -------
    TriageApp
        Ready to `run()` (or `run_test()` in tests).

    Raises
    ------
    KeymapError
        When a keymap file is malformed, names an unknown binding or gives a key twice.
    """
    keymap = load_keymap(
        all_binding_ids(),
        keyset=settings.keyset,
        user_file=settings.user_keymap,
        extra_file=settings.keymap_file,
    )
    return TriageApp(settings, keymap, head_start=head_start)
