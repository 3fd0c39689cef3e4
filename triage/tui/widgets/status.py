"""One-line widgets around the panes: the pane strip, the model line and the pass line."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Final

from rich.cells import cell_len, chop_cells
from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import Footer

if TYPE_CHECKING:
    from rich.console import RenderableType
    from textual.geometry import Size
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


HEADING_MAX_LINES: Final = 3
"""Lines the heading may take; a model too long even for these ends in an ellipsis."""

DETAIL_SEPARATOR: Final = "  |  "
"""Between the formula and each detail (filter, weights, categorical columns, marks)."""


def heading_lines(head: str, formula: str, details: Sequence[str], width: int) -> list[str]:
    """Break the heading into lines of `width` cells between terms and details, never inside.

    The first line holds `head` and the formula's start; each further line starts indented
    with the next term (`+ hour`) or detail (`| where hour > 8`). A term or detail wider
    than a whole line is folded where it reaches the edge. Past `HEADING_MAX_LINES` the last
    line ends in an ellipsis.

    Parameters
    ----------
    head : str
        What names the fit (`fit #3 SAMPLE: `), or empty before the first fit.
    formula : str
        `target ~ a + b`.
    details : sequence of str
        Filter, weights, categorical columns and marked rows, each a short phrase.
    width : int
        Cells on a line.

    Returns
    -------
    list of str
        At most `HEADING_MAX_LINES` lines, none wider than `width`.
    """
    target, tilde, right = formula.partition(" ~ ")
    terms = right.split(" + ") if tilde else [formula]
    first = f"{target} ~ {terms[0]}" if tilde else formula
    pieces = [first, *(f" + {term}" for term in terms[1:])]
    pieces += [DETAIL_SEPARATOR + detail for detail in details]
    indent = "  "
    lines = [head]
    for k, piece in enumerate(pieces):
        if k and cell_len(lines[-1] + piece) > width:
            lines.append(indent + piece.lstrip())
        else:
            lines[-1] += piece
    room = max(width, cell_len(indent) + 1)  # each folded line then moves on
    folded = [part for line in lines for part in _fold(line, room, indent)]
    if len(folded) > HEADING_MAX_LINES:
        from triage.views.format import truncate

        folded = folded[:HEADING_MAX_LINES]
        folded[-1] = truncate(folded[-1] + " …", width)
    return folded


def _fold(line: str, width: int, indent: str) -> list[str]:
    """Cut a line wider than `width` into lines of `width` cells (continuations indented)."""
    lines = []
    while cell_len(line) > width:
        first, *rest = chop_cells(line, width)
        lines.append(first)
        line = indent + "".join(rest)
    return [*lines, line]


class ModelLine(Widget):
    """The heading: the fit on screen (number, basis, model, filter, marks), or the draft.

    Every pane shows results of the fit named here. When one line is too short, the
    heading takes a second (and a third) line, broken between terms: no term, filter or
    weight is cut away (`heading_lines`).
    """

    DEFAULT_CSS = """
    ModelLine { height: auto; }
    """

    text: reactive[str] = reactive("no model yet", layout=True)
    """What to show while no fit is on screen (the model being built)."""
    label: reactive[FitLabel | None] = reactive(None, layout=True)
    """The fit on screen, or None."""

    def _lines(self, width: int) -> tuple[str, list[str]]:
        """Return the bold head and the heading's lines for `width` cells."""
        label = self.label
        if label is None:
            formula, *details = self.text.split(DETAIL_SEPARATOR)
            return "", heading_lines("", formula, details, width)
        head = f"fit #{label.number} {label.basis}: "
        return head, heading_lines(head, label.formula, label.details, width)

    def get_content_height(self, container: Size, viewport: Size, width: int) -> int:
        """Take as many lines as the heading needs at this width."""
        return len(self._lines(width)[1])

    def render(self) -> RenderableType:
        """Draw the heading, the fit's number and basis in bold."""
        head, lines = self._lines(self.size.width)
        text = Text("\n".join(lines), no_wrap=True, overflow="crop")
        text.stylize("bold", 0, len(head))
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
