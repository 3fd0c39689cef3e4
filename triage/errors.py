"""Errors raised by triage; every message says what is wrong, where, and what to do."""

from __future__ import annotations


class TriageError(Exception):
    """Root of every error triage reports to the user without a traceback."""


class SpecError(TriageError, ValueError):
    """The model description (target, terms, weights, filter) is invalid."""


class DataError(TriageError, ValueError):
    """The data cannot support the requested fit (no rows left, bad domain, constant target)."""


class SourceError(TriageError, OSError):
    """A data source cannot be opened or read."""


class ExportError(TriageError, OSError):
    """An export cannot be written."""


class KeymapError(TriageError, ValueError):
    """A keymap file is malformed or names an unknown binding."""


class PassCancelled(TriageError):
    """A pass over the data was stopped by the user."""


class ClusterError(TriageError):
    """A cluster cannot be reached, or a pass on it cannot finish."""
