"""Stop a command cleanly on SIGINT, SIGTERM or SIGHUP: no partial file, one line, exit 128+N.

Ctrl-C, `kill`, a batch scheduler's time limit and a closed SSH session all stop a command
the same way. The first signal sets the pass's cancel event (so worker threads stop within
one batch) and raises `StopRequested` on the main thread, which unwinds through the exports'
clean-up (temporary files are removed); further signals are only remembered, so the clean-up
itself is never cut short.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Iterator
from types import FrameType
from typing import Final

HANDLED_SIGNALS: Final = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)
"""The signals a command turns into a clean stop."""

stop_event: Final = threading.Event()
"""Set by the first handled signal; commands pass it to the engine as the cancel event."""


class StopRequested(BaseException):
    """A signal asked the command to stop (a BaseException, like KeyboardInterrupt)."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum

    @property
    def exit_code(self) -> int:
        """The shell's code for death by this signal: 128 plus its number."""
        return 128 + self.signum

    @property
    def message(self) -> str:
        """One line saying what stopped."""
        name = signal.Signals(self.signum).name
        return f"stopped by {name} before the command finished; no file was written"


_received: list[int] = []


def _handle(signum: int, frame: FrameType | None) -> None:
    _received.append(signum)
    stop_event.set()
    if len(_received) == 1:
        raise StopRequested(signum)


def received() -> StopRequested | None:
    """Return the stop the first handled signal asked for, or None when none came."""
    return StopRequested(_received[0]) if _received else None


@contextlib.contextmanager
def stop_on_signals() -> Iterator[None]:
    """Handle `HANDLED_SIGNALS` in the block (main thread only), then restore the handlers."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _received.clear()
    stop_event.clear()
    previous = {signum: signal.getsignal(signum) for signum in HANDLED_SIGNALS}
    for signum in HANDLED_SIGNALS:
        signal.signal(signum, _handle)
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, signal.SIG_DFL if handler is None else handler)
