"""One-line widgets around the panes: the pane strip, the model line and the pass line."""

from __future__ import annotations

from typing import TYPE_CHECKING

from rich.cells import cell_len
from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import Footer

if TYPE_CHECKING:
    from rich.console import RenderableType
    from textual.screen import Screen

    from triage.results.progress import PassProgress
    from triage.tui.session import FitLabel


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
        """Draw the strip; panes not in front shrink when the line is too short.

        A shortened title keeps as many letters as it needs to differ from every other
        (``Fit`` and ``Fits``), so no two keys are labelled alike.
        """
        titles = [title for _, _, title in self.entries]
        labels = titles
        for room in (None, 4, 3, 2, 1):
            labels = titles if room is None else unique_prefixes(titles, room)
            wanted = sum(
                cell_len(short_key(key)) + len(title if pid == self.current else label) + 2
                for (pid, key, title), label in zip(self.entries, labels, strict=True)
            )
            if wanted <= self.size.width:
                break
        text = Text(no_wrap=True, overflow="ellipsis")
        for (pane_id, key, title), label in zip(self.entries, labels, strict=True):
            is_front = pane_id == self.current
            if is_front:
                style = "reverse bold"
            elif pane_id in self.shown:
                style = "bold"
            else:
                style = "dim"
            text.append(f" {short_key(key)}", style="bold" if is_front else "")
            text.append(f" {title if is_front else label}", style=style)
        return text


def short_key(key: str) -> str:
    """Write a key compactly for the pane strip: ``shift+f8`` as ``⇧f8``, ``ctrl+l`` as ``^l``."""
    return key.replace("shift+", "⇧").replace("ctrl+", "^")


def unique_prefixes(titles: list[str], room: int) -> list[str]:
    """Cut each title to `room` letters, or to as many more as tell it from the others.

    Examples
    --------
    >>> unique_prefixes(["Columns", "Fit", "Fits", "Flags"], 3)
    ['Col', 'Fit', 'Fits', 'Fla']
    """
    out = []
    for title in titles:
        length = room
        while length < len(title) and any(
            other != title and other[:length] == title[:length] for other in titles
        ):
            length += 1
        out.append(title[:length])
    return out


class ModelLine(Widget):
    """The heading: the fit on screen (number, basis, model, filter, marks), or the draft.

    Every pane shows results of the fit named here. When the line is too short, the
    formula is shortened first, so the fit's number, basis and filter stay in view.
    """

    DEFAULT_CSS = """
    ModelLine { height: 1; }
    """

    text: reactive[str] = reactive("no model yet")
    """What to show while no fit is on screen (the model being built)."""
    label: reactive[FitLabel | None] = reactive(None)
    """The fit on screen, or None."""

    def render(self) -> RenderableType:
        """Draw the heading on one line."""
        label = self.label
        if label is None:
            return Text(self.text, no_wrap=True, overflow="ellipsis")
        head = f"fit #{label.number} {label.basis}: "
        tail = "".join(f"  |  {detail}" for detail in label.details)
        room = self.size.width - cell_len(head) - cell_len(tail)
        formula = label.formula
        if cell_len(formula) > room:
            from triage.views.format import truncate

            formula = truncate(formula, max(room, 9))
        text = Text(head, style="bold", no_wrap=True, overflow="ellipsis")
        text.append(formula + tail)
        return text


def progress_text(progress: PassProgress, width: int, *, label: str = "every row") -> str:
    """Describe a running pass: which pass, bar, share done, rows done, rows per second, time left.

    When the line is too short, the bar goes first, then the total rows, then where a later
    pass reads from, then the words around the pass number: the pass, the share done, the
    speed and the time left stay.

    Parameters
    ----------
    progress : PassProgress
        The latest report from the engine.
    width : int
        Room for the whole line, in cells.
    label : str, default="every row"
        What the pass is, said first.

    Returns
    -------
    str
        One line of plain text.
    """
    from triage.views.format import format_count

    fraction = progress.fraction
    speed = f"{format_count(round(progress.rows_per_s))} rows/s"
    done = format_count(progress.rows_done)
    left = "time left unknown" if progress.eta_s is None else f"{progress.eta_s:,.0f} s left"
    stage = f"pass {progress.pass_number} of {progress.n_passes}" if progress.stage else ""
    compact = f"{progress.pass_number}/{progress.n_passes}" if progress.stage else ""
    total = f"/{format_count(progress.rows_total)}" if progress.rows_total else ""
    share = "" if fraction is None else f"{fraction:4.0%}  "
    line = ""
    tries = ((progress.stage, True), (progress.stage, False), (stage, False), (compact, False))
    for full_stage, with_total in tries:
        head = f"{label}, {full_stage}" if full_stage else label
        rows = f"{done}{total if with_total else ''} rows"
        line = f"{head}: {share}{rows}  {speed}  {left}"
        room = width - len(line) - 3
        if fraction is not None and room >= 4:
            bar_width = min(30, room)
            filled = round(fraction * bar_width)
            bar = "#" * filled + "." * (bar_width - filled)
            return f"{head}: [{bar}] {share}{rows}  {speed}  {left}"
        if len(line) <= width:
            return line
    return line


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
    """Rows the user marked (always shown)."""
    pass_label: reactive[str] = reactive("every row")
    """What the running pass is: one that will take the screen, or one bound for Fits."""

    def watch_progress(self, progress: PassProgress | None) -> None:
        """Grow to two lines while a pass runs."""
        self.set_class(progress is not None, "-running")

    def render(self) -> RenderableType:
        """Draw the basis, and the progress of the running pass on a second line."""
        marks = f"  [{self.marks:,} marked]"
        room = max(self.size.width - cell_len(marks), 10)
        basis = self.basis
        if cell_len(basis) > room:
            from triage.views.format import truncate

            basis = truncate(basis, room)
        text = Text(basis, no_wrap=True, overflow="ellipsis")
        text.append(marks, style="bold" if self.marks else "")
        if self.progress is not None:
            text.append("\n")
            progress = progress_text(self.progress, self.size.width, label=self.pass_label)
            text.append(progress, style="bold")
        return text


WIDE_FOOTER = 72
"""Narrower than this, the footer has no room for the command-list entry beside the keys."""


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

    def on_resize(self) -> None:
        """Leave out the command-list entry where it would lie over the keys (ctrl+p stays)."""
        self.show_command_palette = self.size.width >= WIDE_FOOTER

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
