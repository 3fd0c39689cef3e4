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
    """Estimated seconds left, when the total is known (of every pass still to run)."""
    pass_number: int = 1
    """Which pass this is, from 1."""
    n_passes: int = 1
    """Passes the command makes over the rows (a report makes two)."""
    pass_source: str = ""
    """Where a later pass takes its rows from ("from memory", "reading again"), or empty."""

    @property
    def fraction(self) -> float | None:
        """Share of this pass's rows done, between 0 and 1, when the total is known."""
        if not self.rows_total:
            return None
        return min(1.0, self.rows_done / self.rows_total)

    @property
    def stage(self) -> str:
        """The pass in words when there are several ("pass 2 of 2, from memory"), else empty."""
        if self.n_passes < 2:
            return ""
        where = f", {self.pass_source}" if self.pass_source else ""
        return f"pass {self.pass_number} of {self.n_passes}{where}"
