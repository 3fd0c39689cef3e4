"""A progress line on stderr for long passes."""

from __future__ import annotations

import sys
import time
from typing import TYPE_CHECKING, TextIO

if TYPE_CHECKING:
    from triage.results.progress import PassProgress


class StderrProgress:
    """Draw one self-overwriting progress line on stderr once a pass has run for `delay_s`."""

    def __init__(self, *, delay_s: float = 1.0, stream: TextIO | None = None) -> None:
        self.delay_s = delay_s
        self.stream = stream if stream is not None else sys.stderr
        self._start = time.perf_counter()
        self._drawn = False

    def __call__(self, progress: PassProgress) -> None:
        """Draw `progress` if the pass has been running long enough."""
        if time.perf_counter() - self._start < self.delay_s:
            return
        done = f"{progress.rows_done:,} rows"
        if progress.rows_total:
            done = f"{progress.rows_done:,} of {progress.rows_total:,} rows"
        if progress.stage:
            done = f"{progress.stage}: {done}"
        eta = f", about {progress.eta_s:,.0f} s left" if progress.eta_s is not None else ""
        line = f"triage: {done}  {progress.rows_per_s:,.0f} rows/s{eta}"
        self.stream.write("\r" + line.ljust(78)[:120])
        self.stream.flush()
        self._drawn = True

    def finish(self) -> None:
        """End the progress line, if one was drawn."""
        if self._drawn:
            self.stream.write("\n")
            self.stream.flush()
            self._drawn = False
