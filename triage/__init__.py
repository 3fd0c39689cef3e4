"""triage: find where and why a least-squares model fits badly, on tables of any size."""

from __future__ import annotations

__version__ = "0.1.0"
"""The package's version; pyproject.toml reads it from here (no metadata lookup at start-up)."""

__all__ = ["__version__"]
