"""A progress line on stderr for long passes."""

from __future__ import annotations

import shutil
import sys
import time
from typing import TYPE_CHECKING, TextIO

if TYPE_CHECKING:
    from triage.results.progress import PassProgress

LOG_EVERY_S = 30.0
"""How often a stderr that is not a terminal (a log file, a pipe) gets a progress line."""

ERASE_TO_END = "\x1b[K"
"""ANSI: erase the rest of the line, so a shorter line leaves nothing of a longer one."""


class StderrProgress:
    """Report a pass's progress on stderr once it has run for `delay_s`.

    On a terminal, one line overwrites itself; in a log file or pipe, a whole line is
    written at most every `LOG_EVERY_S` seconds, so logs stay readable.
    """

    def __init__(self, *, delay_s: float = 1.0, stream: TextIO | None = None) -> None:
        self.delay_s = delay_s
        self.stream = stream if stream is not None else sys.stderr
        self._on_terminal = self.stream.isatty()
        self._start = time.perf_counter()
        self._last_logged: float | None = None
        self._drawn = False

    def __call__(self, progress: PassProgress) -> None:
        """Report `progress` if the pass has been running long enough."""
        now = time.perf_counter()
        if now - self._start < self.delay_s:
            return
        done = f"{progress.rows_done:,} rows"
        if progress.rows_total:
            done = f"{progress.rows_done:,} of {progress.rows_total:,} rows"
        if progress.stage:
            done = f"{progress.stage}: {done}"
        eta = f", about {progress.eta_s:,.0f} s left" if progress.eta_s is not None else ""
        line = f"triage: {done}  {progress.rows_per_s:,.0f} rows/s{eta}"
        if self._on_terminal:
            # one screen row at most: a wrapped line would not return under the cursor
            columns = shutil.get_terminal_size(fallback=(80, 24)).columns
            self.stream.write("\r" + line[: max(columns - 1, 20)] + ERASE_TO_END)
            self._drawn = True
        elif self._last_logged is None or now - self._last_logged >= LOG_EVERY_S:
            self.stream.write(line + "\n")
            self._last_logged = now
        self.stream.flush()

    def finish(self) -> None:
        """End the progress line, if one was drawn."""
        if self._drawn:
            self.stream.write("\n")
            self.stream.flush()
            self._drawn = False
