"""Shared literal aliases."""

from __future__ import annotations

from typing import Literal, TypeAlias

Sampling: TypeAlias = Literal["groups", "uniform"]
"""How a sample is drawn: whole row groups (or CSV blocks) at random, or exact uniform rows."""

Criterion: TypeAlias = Literal["abs_resid", "studentized", "leverage", "cooks"]
"""A ranking for the worst-rows lists."""

CRITERIA: tuple[Criterion, ...] = ("abs_resid", "studentized", "leverage", "cooks")
"""Every worst-row criterion, in display order."""

TermKind: TypeAlias = Literal["numeric", "transform", "interaction", "categorical"]
"""What a model term is built from."""
