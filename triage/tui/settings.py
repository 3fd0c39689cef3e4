"""Settings of one app session: one typed object built from the command line."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

from triage._typing import Sampling

if TYPE_CHECKING:
    from triage.data.source import CsvOptions

MAX_SHOWN = 2
"""Most columns shown beside each worst row (`--show`): they must fit at 80 columns."""

DEFAULT_SAMPLE_ROWS = 200_000
"""Rows in a quick fit's sample unless the user asks for another number."""


@dataclass(frozen=True)
class Settings:
    """How the app opens: data, model, sample and keys."""

    data: str | None = None
    """Path, folder or glob of the data source; None starts with no data."""
    target: str | None = None
    """Target column given on the command line (the model is fitted at once when set)."""
    terms: str = ""
    """Terms in the term syntax, e.g. `distance_km, log(stops), depot`."""
    weights: str | None = None
    """Column of positive weights, or None for ordinary least squares."""
    where: str | None = None
    """Row filter in SQL expression syntax, or None for every row."""
    categorical: tuple[str, ...] = ()
    """Columns forced categorical."""
    intercept: bool = True
    """Fit a constant term."""
    reference: dict[str, str] = field(default_factory=dict)
    """Reference level per categorical column (default: the most frequent level)."""
    max_levels: int = 50
    """Cap on the levels of a categorical column."""
    max_memory: int | None = None
    """Most bytes a design may take; None for the default share of the machine's memory."""
    drop_invalid: bool = False
    """Leave out rows outside a transform's domain instead of stopping."""
    csv: CsvOptions | None = None
    """How to read a CSV source; None uses the data layer's defaults."""
    sample_rows: int = DEFAULT_SAMPLE_ROWS
    """Rows in the quick fit's sample."""
    is_full_at_start: bool = False
    """Start a pass over every row as soon as the model is fitted on the sample."""
    seed: int = 0
    """Seed of the sample, so a session can be repeated."""
    sampling: Sampling = "groups"
    """How the sample is drawn: `groups` (whole row groups at random) or `uniform`."""
    keyset: str | None = None
    """A shipped alternative keymap laid over the default, e.g. `fkeys`."""
    keymap_file: Path | None = None
    """A keymap file given with `--keymap`; applied last."""
    user_keymap: Path | None = None
    """The user's keymap file; None means `keymap.toml` in the configuration directory."""
    top_k: int = 50
    """Rows kept per worst-row list."""
    show: tuple[str, ...] = ()
    """Up to two columns shown beside each worst row (an id, a name)."""
    is_ordered: bool = False
    """Row order means something (time order): judge serial correlation and trends."""
    scheduler: str | None = None
    """Address of the Dask scheduler that runs passes over every row (`--engine dask`); None
    runs them in this process. Sample fits always run here."""
    is_colorless: bool = field(default_factory=lambda: bool(os.environ.get("NO_COLOR")))
    """Draw without colour (set when the `NO_COLOR` environment variable is non-empty)."""
