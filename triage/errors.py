"""Errors raised by triage; every message says what is wrong, where, and what to do."""

from __future__ import annotations

_ESCAPES = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def one_line(text: str) -> str:
    r"""Return `text` with newlines and other control characters escaped, so it shows on one line.

    Text a user typed (a term, a filter, a path) is echoed in messages; a newline or an
    escape sequence in it must not break the one-line message or drive the terminal.

    Examples
    --------
    >>> one_line("log(x)\n+ y\x1b[2J")
    'log(x)\\n+ y\\x1b[2J'
    """
    if text.isprintable():
        return text
    return "".join(
        _ESCAPES.get(c, f"\\x{ord(c):02x}" if ord(c) < 0x100 else f"\\u{ord(c):04x}")
        if not c.isprintable()
        else c
        for c in text
    )


def numeric_warning_message(warning: Warning) -> str:
    """Return one line for a floating-point warning that no check of ours made a clear error.

    numpy reports overflow and invalid values as RuntimeWarnings; the command line and the
    app treat them as errors, so none reaches the terminal as a warning.
    """
    return (
        "a computation went outside the range of floating-point numbers "
        f"({one_line(str(warning))}); look for values near the float limit (about 1e308) "
        "in the columns used and rescale them"
    )


class TriageError(Exception):
    """Root of every error triage reports to the user without a traceback.

    Its text is always one line: control characters in echoed user text are escaped.
    """

    def __str__(self) -> str:
        return one_line(super().__str__())


class SpecError(TriageError, ValueError):
    """The model description (target, terms, weights, filter) is invalid."""


class DataError(TriageError, ValueError):
    """The data cannot support the requested fit (no rows left, bad domain, constant target)."""


class SourceError(TriageError, OSError):
    """A data source cannot be opened or read."""


class SourceChanged(SourceError):
    """A file of the source changed (size, time, identity or row count) while it was read."""


class ExportError(TriageError, OSError):
    """An export cannot be written."""


class KeymapError(TriageError, ValueError):
    """A keymap file is malformed or names an unknown binding."""


class PassCancelled(TriageError):
    """A pass over the data was stopped by the user."""


class ClusterError(TriageError):
    """A cluster cannot be reached, or a pass on it cannot finish."""
