"""Command-line options shared by every command that fits a model."""

from __future__ import annotations

import argparse
import contextlib
import importlib.util
import os
import shutil
from collections.abc import Callable, Iterator, Mapping
from typing import TYPE_CHECKING, Any

from triage._typing import ALL_ROWS, RowsToRead

if TYPE_CHECKING:
    from triage.core.holdout import HoldoutRule
    from triage.core.spec import ModelSpec
    from triage.data.delimited import CsvOptions
    from triage.data.source import Source
    from triage.engine.cluster import ClusterEngine

DEFAULT_SAMPLE_ROWS = 200_000
"""Rows in the default sample; `--rows all` streams every row instead."""


def integer_option(name: str, *, minimum: int) -> Callable[[str], int]:
    """Return an argparse `type` that reads an integer of at least `minimum` for option `name`.

    Digit separators `_` and `,` are allowed (`--rows 2,000,000`). Every such option's
    message comes from here: what was expected and what was received.
    """
    expected = {0: "a non-negative integer", 1: "a positive integer"}.get(
        minimum, f"an integer of at least {minimum}"
    )

    def parse(text: str) -> int:
        try:
            value = int(text.replace("_", "").replace(",", ""))
        except ValueError:
            value = minimum - 1
        if value < minimum:
            msg = f"`{name}` must be {expected}, got `{text}`"
            raise argparse.ArgumentTypeError(msg)
        return value

    return parse


def parse_rows(text: str) -> RowsToRead:
    """Parse `--rows`: a positive integer, or `all` (returned as `ALL_ROWS`)."""
    if text.strip().lower() == "all":
        return ALL_ROWS
    try:
        return integer_option("--rows", minimum=1)(text)
    except argparse.ArgumentTypeError:
        msg = f"`--rows` must be a positive integer or `all`, got `{text}`"
        raise argparse.ArgumentTypeError(msg) from None


def add_source_options(parser: argparse.ArgumentParser) -> None:
    """Add the data argument and the CSV reading options."""
    parser.add_argument("data", metavar="DATA", help="Parquet file, folder or glob; CSV; Arrow IPC")
    group = parser.add_argument_group("CSV reading")
    group.add_argument(
        "--separator", default=None, help="field separator (default `,`; tab for .tsv)"
    )
    group.add_argument("--no-header", action="store_true", help="the first line is data, not names")
    group.add_argument(
        "--null-value",
        action="append",
        default=None,
        metavar="TEXT",
        help="text read as missing (repeatable; default: empty, NA, NaN, null)",
    )


def add_model_options(parser: argparse.ArgumentParser, *, terms_repeatable: bool = False) -> None:
    """Add the options that describe a model (target, terms, weights, filter, coding)."""
    group = parser.add_argument_group("model")
    group.add_argument("--target", "-y", help="column to explain (or give `y ~ ...` in --terms)")
    if terms_repeatable:
        group.add_argument(
            "--terms",
            "-x",
            action="append",
            required=True,
            help="terms of one model; repeat for each model to compare",
        )
    else:
        group.add_argument(
            "--terms",
            "-x",
            default="",
            help='terms, e.g. "distance_km, log(weight_kg), depot" or "minutes ~ stops + depot"',
        )
    group.add_argument("--no-intercept", action="store_true", help="fit without a constant term")
    group.add_argument(
        "--weights", "-w", help="column of positive weights (weighted least squares)"
    )
    group.add_argument(
        "--where", help="keep rows matching an SQL condition, e.g. \"depot = 'north'\""
    )
    group.add_argument(
        "--categorical",
        default="",
        metavar="COLS",
        help="comma-separated numeric columns to treat as categories",
    )
    group.add_argument(
        "--reference",
        action="append",
        default=[],
        metavar="COL=LEVEL",
        help="reference level of a categorical column (default: its most frequent level)",
    )
    group.add_argument(
        "--max-levels",
        type=integer_option("--max-levels", minimum=2),
        default=50,
        help="cap on levels of a category (default 50)",
    )
    group.add_argument(
        "--max-memory",
        type=parse_memory,
        default=None,
        metavar="SIZE",
        help="most memory a model's design may take, e.g. 4G (default: half the machine's)",
    )
    group.add_argument(
        "--drop-invalid",
        action="store_true",
        help="leave out rows outside a transform's domain (e.g. log of 0) instead of stopping",
    )


def add_row_options(parser: argparse.ArgumentParser, *, every_row: bool = False) -> None:
    """Add the options that choose which rows a pass reads; `every_row` makes `all` the default."""
    group = parser.add_argument_group("rows")
    default = "all" if every_row else f"{DEFAULT_SAMPLE_ROWS:,}"
    group.add_argument(
        "--rows",
        type=parse_rows,
        default=ALL_ROWS if every_row else DEFAULT_SAMPLE_ROWS,
        metavar="N|all",
        help=f"sample about N rows or stream `all` rows (default {default})",
    )
    group.add_argument(
        "--seed",
        type=integer_option("--seed", minimum=0),
        default=0,
        help="seed of the sample (default 0)",
    )
    group.add_argument(
        "--sample",
        choices=("groups", "uniform"),
        default="groups",
        help="groups: whole row groups at random (fast); uniform: exact random rows (full read)",
    )
    group.add_argument(
        "--workers",
        type=integer_option("--workers", minimum=1),
        default=None,
        metavar="N",
        help="threads of a pass (default: every CPU this process may use); results do not change",
    )


def csv_options_from_args(args: argparse.Namespace) -> CsvOptions:
    """Return the CSV reading options given on the command line."""
    from triage.data.source import CsvOptions

    defaults = CsvOptions()
    return CsvOptions(
        separator=args.separator if args.separator is not None else defaults.separator,
        has_header=not args.no_header,
        null_values=tuple(args.null_value) if args.null_value else defaults.null_values,
    )


def categorical_columns(args: argparse.Namespace) -> tuple[str, ...]:
    """Return the columns named with `--categorical`."""
    return tuple(c.strip() for c in args.categorical.split(",") if c.strip())


def open_source_from_args(args: argparse.Namespace) -> Source:
    """Open the data source named on the command line with its CSV options."""
    from triage.data.source import open_source

    return open_source(args.data, csv=csv_options_from_args(args))


def parse_reference(pairs: list[str]) -> dict[str, str]:
    """Parse repeated `--reference COL=LEVEL` options (`COL[LEVEL]` is read the same way)."""
    from triage.core.spec import split_indicator_name
    from triage.errors import SpecError

    reference: dict[str, str] = {}
    for pair in pairs:
        parts = split_indicator_name(pair)
        if parts is None:
            msg = (
                f"`--reference` takes COL=LEVEL, got `{pair}`; "
                "for example `--reference depot=north`"
            )
            raise SpecError(msg)
        reference[parts[0]] = parts[1]
    return reference


def spec_from_args(
    args: argparse.Namespace, source: Source, *, terms: str | None = None
) -> ModelSpec:
    """Build and validate the model spec from parsed options against the source's schema."""
    import functools

    from triage.core.spec import build_spec
    from triage.data.text_columns import text_column_facts

    return build_spec(
        source.schema(),
        target=args.target,
        terms=args.terms if terms is None else terms,
        intercept=not args.no_intercept,
        weights=args.weights,
        where=args.where,
        categorical=categorical_columns(args),
        reference=parse_reference(args.reference),
        max_levels=args.max_levels,
        max_memory=args.max_memory,
        drop_invalid=args.drop_invalid,
        check_text=functools.partial(text_column_facts, source),
    )


_SIZE_UNITS = {"": 1, "K": 1 << 10, "M": 1 << 20, "G": 1 << 30, "T": 1 << 40}


def add_width_option(parser: argparse.ArgumentParser) -> None:
    """Add `--width`, the text's width in columns (default: the terminal's, at most 120)."""
    parser.add_argument(
        "--width",
        type=integer_option("--width", minimum=40),
        default=None,
        help="text width in columns (default: the terminal's, at most 120)",
    )


def text_width(args: argparse.Namespace) -> int:
    """Return the width to lay text out for: `--width`, else the terminal's (100 in a pipe)."""
    width: int = args.width or min(shutil.get_terminal_size((100, 40)).columns, 120)
    return width


def parse_memory(text: str) -> int:
    """Parse `--max-memory`: bytes, or a number with K, M, G or T (powers of 1,024)."""
    cleaned = text.strip().upper().removesuffix("IB").removesuffix("B")
    unit = cleaned[-1:] if cleaned[-1:] in _SIZE_UNITS else ""
    try:
        value = float(cleaned.removesuffix(unit)) * _SIZE_UNITS[unit]
    except ValueError:
        value = 0.0
    if not value >= 1:
        msg = f"`--max-memory` must be a size such as 4G, 500M or 2000000000, got `{text}`"
        raise argparse.ArgumentTypeError(msg)
    return int(value)


def _fraction(text: str) -> float:
    """Parse `--holdout`: a number strictly between 0 and 1."""
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not 0.0 < value < 1.0:
        msg = f"`--holdout` must be a fraction between 0 and 1 (e.g. 0.2), got `{text}`"
        raise argparse.ArgumentTypeError(msg)
    return value


def add_holdout_options(parser: argparse.ArgumentParser) -> argparse._ArgumentGroup:
    """Add `--holdout` / `--holdout-by COL --cut VALUE`; return the group for more options."""
    group = parser.add_argument_group("held-out rows")
    split = group.add_mutually_exclusive_group()
    split.add_argument(
        "--holdout",
        type=_fraction,
        metavar="FRACTION",
        help="hold out this share of rows at random (seeded by `--seed`) and score them",
    )
    split.add_argument(
        "--holdout-by",
        metavar="COL",
        help="hold out rows with COL >= `--cut` (fit on earlier rows, score later ones)",
    )
    group.add_argument("--cut", metavar="VALUE", help="the cut value for `--holdout-by`")
    return group


def holdout_rule_from_args(args: argparse.Namespace) -> HoldoutRule | None:
    """Return the held-out rule the options describe, or None when no rows are held out."""
    from triage.errors import SpecError

    if args.cut is not None and args.holdout_by is None:
        msg = (
            f"`--cut {args.cut}` needs `--holdout-by COL` to say which column it cuts; "
            "add it, or leave out `--cut`"
        )
        raise SpecError(msg)
    if args.holdout is None and args.holdout_by is None:
        return None
    from triage.core.holdout import HoldoutRule  # only when rows are held out

    if args.holdout is not None:
        return HoldoutRule(fraction=args.holdout, seed=args.seed)
    return HoldoutRule(column=args.holdout_by, cut=args.cut, seed=args.seed)


def add_engine_options(parser: argparse.ArgumentParser) -> None:
    """Add `--engine local|dask` and `--scheduler ADDRESS` (where full passes run)."""
    group = parser.add_argument_group("where full passes run")
    group.add_argument(
        "--engine",
        choices=("local", "dask"),
        default="local",
        help="local: this process (default); dask: the Dask cluster at `--scheduler`",
    )
    group.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        default=None,
        help="the Dask scheduler, e.g. tcp://10.0.0.5:8786 (default: $TRIAGE_SCHEDULER)",
    )


def scheduler_address(engine: str, scheduler: str | None) -> str | None:
    """Return the scheduler a `--engine dask` pass uses, or None for the local engine.

    Raises
    ------
    SpecError
        When `--scheduler` is given to the local engine, or Dask is not installed.
    """
    from triage.errors import SpecError

    if engine == "local":
        if scheduler is not None:
            msg = "`--scheduler` is used only with `--engine dask`; add `--engine dask`"
            raise SpecError(msg)
        return None
    from triage.engine.cluster import INSTALL_HINT, SCHEDULER_VARIABLE

    if not _is_installed("distributed"):
        msg = f"`--engine dask` needs Dask distributed, which is not installed; {INSTALL_HINT}"
        raise SpecError(msg)
    return scheduler if scheduler is not None else os.environ.get(SCHEDULER_VARIABLE, "")


@contextlib.contextmanager
def pass_engine(args: argparse.Namespace) -> Iterator[ClusterEngine | None]:
    """Give the engine the options name (None: this process); close its connection after.

    The cluster is contacted only when a full pass first needs it, never for a sample.
    """
    address = scheduler_address(args.engine, args.scheduler)
    if address is None:
        yield None
        return
    from triage.engine.cluster import ClusterEngine

    with ClusterEngine(address) as engine:
        yield engine


def _is_installed(module: str) -> bool:
    """Return True when `module` can be imported (without importing it)."""
    try:
        return importlib.util.find_spec(module) is not None
    except (ImportError, ValueError):  # a module blocked in sys.modules has no spec
        return False


def shown_columns(text: str, schema: Mapping[str, Any] | None) -> tuple[str, ...]:
    """Read `--show`: up to two columns, comma-separated (checked against `schema` if given)."""
    from triage.core.filter import closest_names_hint
    from triage.errors import SpecError
    from triage.tui.settings import MAX_SHOWN

    names = tuple(dict.fromkeys(c.strip() for c in text.split(",") if c.strip()))
    if len(names) > MAX_SHOWN:
        msg = f"`--show` takes at most {MAX_SHOWN} columns, got {len(names)}: `{text}`"
        raise SpecError(msg)
    for name in names:
        if schema is not None and name not in schema:
            msg = f"unknown column `{name}` in `--show`{closest_names_hint(name, schema)}"
            raise SpecError(msg)
    return names
