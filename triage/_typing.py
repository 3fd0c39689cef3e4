"""Shared literal aliases, and `ALL_ROWS`."""

from __future__ import annotations

import enum
from typing import Final, Literal, TypeAlias

Sampling: TypeAlias = Literal["groups", "uniform"]
"""How a sample is drawn: whole row groups (or CSV blocks) at random, or exact uniform rows."""

Criterion: TypeAlias = Literal["abs_resid", "studentized", "leverage", "cooks"]
"""A ranking for the worst-rows lists."""

CRITERIA: tuple[Criterion, ...] = ("abs_resid", "studentized", "leverage", "cooks")
"""Every worst-row criterion, in display order."""

TermKind: TypeAlias = Literal["numeric", "transform", "interaction", "categorical", "indicator"]
"""What a model term is built from."""


class AllRows(enum.Enum):
    """The type of `ALL_ROWS` (one member, so a type checker narrows ``rows is ALL_ROWS``)."""

    ALL_ROWS = "all"


ALL_ROWS: Final = AllRows.ALL_ROWS
"""Given as `rows`: a pass reads every row instead of a sample."""

RowsToRead: TypeAlias = int | Literal[AllRows.ALL_ROWS]
"""How many rows a pass reads: a sample of about this many, or `ALL_ROWS`."""
