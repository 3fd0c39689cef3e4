"""How far a pass has come: the value every progress report carries."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["PassProgress"]


@dataclass(frozen=True)
class PassProgress:
    """How far a pass has come."""

    rows_done: int
    """Rows read so far (before any filter)."""
    rows_total: int | None
    """Rows the pass will read, when known from metadata."""
    elapsed_s: float
    """Seconds since the pass started."""
    rows_per_s: float
    """Mean reading speed so far."""
    eta_s: float | None
    """Estimated seconds left, when the total is known."""

    @property
    def fraction(self) -> float | None:
        """Share of the rows done, between 0 and 1, when the total is known."""
        if not self.rows_total:
            return None
        return min(1.0, self.rows_done / self.rows_total)
