"""A file cut short under a memory-mapped read ends the process with one line, not a bus error.

polars maps CSV and Parquet files into memory while it reads them. When such a file is
truncated under the read, touching a page past its new end raises SIGBUS, which kills the
process with no message (and would leave an export's temporary file behind). No Python-level
handler can help: the faulting instruction would run again at once. This guard installs a C
signal handler (through ctypes) that calls back into Python once, removes the temporary files
of exports under way, gives the terminal back if the app had it, prints one line naming the
file and exits with code 2.
"""

from __future__ import annotations

import ctypes
import os
import signal
from pathlib import Path
from typing import Any, Final

from triage.data.snapshot import changed_file_being_read, changed_message

TEMPORARIES: Final[set[Path]] = set()
"""Temporary files of the exports being written now (`data/export.py` keeps it); removed here.

It lives in this module, which imports only the standard library, so the command line
installs the guard without loading polars and pyarrow first (0.29 s measured here).
"""

EXIT_CODE: Final = 2
"""Exit code after a bus error: bad input, as for a file changed under any other read."""

_installed: list[Any] = []
"""The ctypes callback, kept alive for the life of the process once installed."""


_TERMINAL_RESET: Final = "\x1b[?1000l\x1b[?1003l\x1b[?1006l\x1b[?2004l\x1b[?25h\x1b[?1049l"
"""Mouse reports, bracketed paste off; cursor shown; the main screen back (as the app found it)."""

_terminal: list[Any] = []
"""The terminal's settings when the guard was installed, if standard input is a terminal."""


def _restore_terminal() -> None:
    """Put the terminal back as it was if the app had changed it (raw mode, other screen)."""
    if not _terminal:
        return
    import termios

    fd, settings = _terminal
    try:
        if termios.tcgetattr(fd) == settings:
            return  # no app running: nothing to undo
        termios.tcsetattr(fd, termios.TCSANOW, settings)
        os.write(1, _TERMINAL_RESET.encode())
    except (OSError, termios.error):
        return


def _on_bus_error(signum: int) -> None:
    for temporary in list(TEMPORARIES):
        temporary.unlink(missing_ok=True)
    _restore_terminal()
    path = changed_file_being_read()
    line = (
        changed_message(path, how="was cut short")
        if path is not None
        else "a file was cut short while it was being read; nothing was written"
    )
    os.write(2, f"triage: {line}\n".encode(errors="replace"))
    os._exit(EXIT_CODE)


def install_bus_guard() -> bool:
    """Handle SIGBUS as described above; return whether the guard is in place.

    Installed once per process; where the C library or SIGBUS is not available (not a
    POSIX system), nothing is done and False is returned.
    """
    if _installed:
        return True
    bus = getattr(signal, "SIGBUS", None)
    if bus is None:
        return False
    try:
        libc = ctypes.CDLL(None)
    except OSError:
        return False
    prototype = ctypes.CFUNCTYPE(None, ctypes.c_int)
    callback = prototype(_on_bus_error)
    libc.signal.restype = ctypes.c_void_p
    libc.signal.argtypes = [ctypes.c_int, prototype]
    libc.signal(bus, callback)
    _installed.append(callback)
    if os.isatty(0):
        import termios

        _terminal[:] = [0, termios.tcgetattr(0)]
    return True
