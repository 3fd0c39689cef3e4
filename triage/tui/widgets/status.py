"""One-line widgets around the panes: the pane strip, the model line and the pass line."""

from __future__ import annotations

from typing import TYPE_CHECKING

from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import Footer

if TYPE_CHECKING:
    from rich.console import RenderableType
    from textual.screen import Screen

    from triage.results.progress import PassProgress


class PaneStrip(Widget):
    """The names of the panes with their keys; the current one is highlighted."""

    DEFAULT_CSS = """
    PaneStrip { height: 1; }
    """

    entries: reactive[tuple[tuple[str, str, str], ...]] = reactive(())
    """(pane id, key shown, title) per pane, in key order."""
    current: reactive[str] = reactive("")
    """Id of the pane in front."""
    shown: reactive[frozenset[str]] = reactive(frozenset())
    """Ids of every pane on screen (several when the terminal is large)."""

    def render(self) -> RenderableType:
        """Draw the strip; panes not in front shrink to their key when the line is too short."""
        cut = None
        for room in (None, 4, 3):
            cut = room
            wanted = sum(
                len(key) + len(title if pid == self.current else title[:room]) + 2
                for pid, key, title in self.entries
            )
            if wanted <= self.size.width:
                break
        text = Text(no_wrap=True, overflow="ellipsis")
        for pane_id, key, title in self.entries:
            is_front = pane_id == self.current
            if is_front:
                style = "reverse bold"
            elif pane_id in self.shown:
                style = "bold"
            else:
                style = "dim"
            text.append(f" {key}", style="bold" if is_front else "")
            label = title if is_front else title[:cut]
            text.append(f" {label}", style=style)
        return text


class ModelLine(Widget):
    """The model being built or shown, in the term syntax, with filter and weights."""

    DEFAULT_CSS = """
    ModelLine { height: 1; }
    """

    text: reactive[str] = reactive("no model yet")
    """What to show."""

    def render(self) -> RenderableType:
        """Draw the model text on one line."""
        return Text(self.text, no_wrap=True, overflow="ellipsis")


def progress_text(progress: PassProgress, width: int) -> str:
    """Describe a running pass: which pass, bar, share done, rows done, rows per second, time left.

    Parameters
    ----------
    progress : PassProgress
        The latest report from the engine.
    width : int
        Room for the whole line, in cells.

    Returns
    -------
    str
        One line of plain text.
    """
    from triage.views.format import format_count

    fraction = progress.fraction
    speed = f"{format_count(round(progress.rows_per_s))} rows/s"
    done = format_count(progress.rows_done)
    if progress.rows_total:
        done = f"{done}/{format_count(progress.rows_total)} rows"
    else:
        done = f"{done} rows"
    left = "time left unknown" if progress.eta_s is None else f"{progress.eta_s:,.0f} s left"
    tail = f"{done}  {speed}  {left}"
    head = f"every row, {progress.stage}" if progress.stage else "every row"
    if fraction is None:
        return f"{head}: {tail}"
    bar_width = max(4, min(30, width - len(tail) - len(head) - 12))
    filled = round(fraction * bar_width)
    bar = "#" * filled + "." * (bar_width - filled)
    return f"{head}: [{bar}] {fraction:4.0%}  {tail}"


class PassLine(Widget):
    """What the results on screen were computed on, and the running pass under it if any."""

    DEFAULT_CSS = """
    PassLine { height: 1; }
    PassLine.-running { height: 2; }
    """

    basis: reactive[str] = reactive("no fit yet")
    """Which rows the shown results come from, e.g. `sample: 200,000 of 20,000,000 rows`."""
    progress: reactive[PassProgress | None] = reactive(None)
    """Latest report of the running full pass, None when no pass runs."""
    marks: reactive[int] = reactive(0)
    """Rows the user marked."""

    def watch_progress(self, progress: PassProgress | None) -> None:
        """Grow to two lines while a pass runs."""
        self.set_class(progress is not None, "-running")

    def render(self) -> RenderableType:
        """Draw the basis, and the progress of the running pass on a second line."""
        text = Text(self.basis, no_wrap=True, overflow="ellipsis")
        if self.marks:
            text.append(f"  [{self.marks:,} marked]", style="bold")
        if self.progress is not None:
            text.append("\n")
            text.append(progress_text(self.progress, self.size.width), style="bold")
        return text


class KeyFooter(Footer):
    """Textual's footer of keys, rebuilt only when the keys it shows change.

    Textual rebuilds the footer (every key a widget) whenever the bindings may have changed:
    each focus change and each `refresh_bindings`. Most change nothing it shows, and the
    rebuilds took the main thread's time while the first fit was being made.
    """

    def __init__(self, *, compact: bool = False) -> None:
        super().__init__(compact=compact)
        self.shown_keys: tuple[tuple[str, str, bool], ...] | None = None
        """(key, description, enabled) of each key shown at the last rebuild."""

    def bindings_changed(self, screen: Screen[object]) -> None:
        """Rebuild when the keys shown, their descriptions or their states changed."""
        shown = tuple(
            (active.binding.key, active.binding.description, active.enabled)
            for active in screen.active_bindings.values()
            if active.binding.show
        )
        if shown == self.shown_keys:
            return
        super().bindings_changed(screen)
        if self.is_attached and screen is self.screen and screen.app.app_focus:
            self.shown_keys = shown  # the rebuild is under way
