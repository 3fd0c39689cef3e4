"""Design matrices from polars frames: learn coding on a sample, then build every batch.

`DesignBuilder.learn` fixes everything a batch must not change (categorical levels and
reference levels, the mean and SD behind ``std(x)``, the column names), then
`DesignBuilder.build` turns each batch into float64 arrays with one polars ``select``
and one ``to_numpy``, dropping and counting rows it cannot use.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import re
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import TYPE_CHECKING, Final

import numpy as np
import polars as pl

from triage.core.indicator_terms import (
    IndicatorLevel,
    check_indicator_levels,
    count_indicator_rows,
    indicator_match,
    indicator_parts,
)
from triage.core.indicators import CodedDesign, IndicatorCodes
from triage.core.levels import (
    FoundLevels,
    LevelTable,
    category_codes,
    count_levels,
    level_code,
    level_text,
    positions_in,
    present_value,
)
from triage.core.spec import Term, indicator_name, is_categorical_dtype, quote_name
from triage.errors import DataError, SpecError
from triage.wording import counted

if TYPE_CHECKING:
    from collections.abc import Mapping, Sequence

    from numpy.typing import NDArray

    from triage._typing import TermKind
    from triage.core.spec import ModelSpec, SchemaLike

ROW_INDEX: Final = "__row"
"""Column holding each row's 0-based position in the source (`triage.data.source` uses it)."""

INTERCEPT: Final = "intercept"
"""Name of the column of ones, and of its term."""

STATUS_USED: Final = "used"
"""`DesignBuilder.row_status` of a row the design keeps."""
STATUS_MISSING: Final = "missing value"
"""A row with a null, NaN or infinite value in a model column."""
STATUS_UNSEEN: Final = "level not in the fit"
"""A row whose categorical level the fit did not learn (only after a sample fit)."""
STATUS_DOMAIN: Final = "outside a transform's domain"
"""A row outside a transform's domain, with weight <= 0, or too large for float64."""

_Y: Final = "__y"
_W: Final = "__w"
_PRESENT: Final = "__present"
_IN_LEVELS: Final = "__in_levels"
_MISSING: Final = "__missing"
_UNSEEN: Final = "__unseen"
_DOMAIN: Final = "__domain"
_SHOWN_LEVELS: Final = 10
"""How many levels an error message lists."""

_DROP_HINT: Final = (
    "filter them with `--where` or use `log1p`, or pass `--drop-invalid` to leave those rows out"
)
_OVERFLOW_TRANSFORMS: Final = frozenset({"square", "pow", "poly"})
_SQL_NAME: Final = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")


@dataclass(frozen=True)
class _DomainCheck:
    """A condition a used value must meet, with the message when it fails."""

    name: str
    """Alias of the count column in the check select."""
    bad: pl.Expr
    """True where the value is outside the domain."""
    problem: str
    """What is wrong, e.g. "log of a value <= 0 in `log(minutes)`"."""
    hint: str
    """What to do about it."""


@dataclass(frozen=True)
class DesignBatch:
    """One batch turned into arrays, with the rows it kept and counts of those it left out.

    Attributes
    ----------
    x : ndarray of shape (n_rows, n_columns)
        Design matrix, float64, Fortran-ordered; the intercept column comes first.
    y : ndarray of shape (n_rows,)
        Target values.
    weights : ndarray of shape (n_rows,) or None
        Case weights (all > 0), or None for an unweighted model.
    rows : ndarray of shape (n_rows,)
        Positions of the kept rows in the source (int64).
    frame : polars.DataFrame
        The kept rows: the spec's source columns plus `ROW_INDEX`.
    n_dropped_missing : int
        Rows left out for a null, NaN or infinite value in a model column.
    n_dropped_domain : int
        Rows left out (with ``drop_invalid``) for a value outside a transform's domain,
        a weight <= 0, or a design value too large for float64.
    n_dropped_unseen_level : int
        Rows left out for a categorical level not seen in the sample.
    """

    x: NDArray[np.float64]
    y: NDArray[np.float64]
    weights: NDArray[np.float64] | None
    rows: NDArray[np.int64]
    frame: pl.DataFrame
    n_dropped_missing: int
    n_dropped_domain: int
    n_dropped_unseen_level: int

    @property
    def n_rows(self) -> int:
        """Number of rows kept."""
        return int(self.x.shape[0])


@dataclass(frozen=True)
class CodedBatch:
    """One batch with its categoricals as level codes, not indicator columns (`build_coded`).

    Attributes as for `DesignBatch`, with `design` (a `CodedDesign`) in place of ``x``.
    """

    design: CodedDesign
    y: NDArray[np.float64]
    weights: NDArray[np.float64] | None
    rows: NDArray[np.int64]
    frame: pl.DataFrame
    n_dropped_missing: int
    n_dropped_domain: int
    n_dropped_unseen_level: int

    @property
    def n_rows(self) -> int:
        """Number of rows kept."""
        return int(self.y.shape[0])


@dataclass(frozen=True)
class DesignColumns:
    """One batch's design as separate columns, read where polars holds them (see `build_columns`).

    Attributes
    ----------
    predictors : list of ndarray of shape (n_rows,)
        The design columns after the intercept (all of them in a model without one),
        float64, possibly read-only views of the batch.
    y : ndarray of shape (n_rows,)
        Target values.
    """

    predictors: list[NDArray[np.float64]]
    y: NDArray[np.float64]

    @property
    def n_rows(self) -> int:
        """Number of rows."""
        return int(self.y.shape[0])


def _is_float(dtype: pl.DataType | type[pl.DataType]) -> bool:
    return bool(dtype.is_float()) or bool(dtype.is_decimal())


def _as_float(column: str) -> pl.Expr:
    return pl.col(column).cast(pl.Float64)


def _match_levels(
    column: str, dtype: pl.DataType | type[pl.DataType], levels: Sequence[str]
) -> tuple[pl.Expr, list[pl.Expr]]:
    """Build "is one of `levels`" and one "equals level" mask per level.

    Text, Categorical and Enum columns are compared as they are and booleans against
    True/False: casting a Categorical to text per dummy was 6x slower (measured: 8 ms
    against 1.2 ms for four dummies on 64k rows). Other columns are compared as text.
    """
    if dtype == pl.Boolean:
        flags = [level == "true" for level in levels]
        return pl.col(column).is_in(flags), [pl.col(column) == flag for flag in flags]
    source = pl.col(column) if is_categorical_dtype(dtype) else level_text(column)
    return source.is_in(list(levels)), [source == level for level in levels]


def _all(exprs: list[pl.Expr]) -> pl.Expr:
    return pl.all_horizontal(exprs) if exprs else pl.lit(value=True)


def _any(exprs: list[pl.Expr]) -> pl.Expr:
    return pl.any_horizontal(exprs) if exprs else pl.lit(value=False)


def target_term(spec: ModelSpec) -> Term:
    """Return the target as a term: its column, or a transform of it (``log(cost) ~ ...``)."""
    kind: TermKind = "numeric" if spec.target_transform is None else "transform"
    return Term(spec.target_label, kind, spec.target, spec.target_transform)


def _single_columns(term: Term) -> list[Term]:
    """List the one-column terms inside a term (itself, or an interaction's factors)."""
    return list(term.factors) if term.kind == "interaction" else [term]


def _domain_checks(spec: ModelSpec) -> list[_DomainCheck]:
    """One check per distinct log, log1p or sqrt term (in interactions, the target), and weights."""
    checks: dict[str, _DomainCheck] = {}
    for term in (*spec.terms, target_term(spec)):
        for part in _single_columns(term):
            if part.label in checks or part.column is None:
                continue
            x = _as_float(part.column)
            name = f"__check{len(checks)}"
            if part.transform == "log":
                checks[part.label] = _DomainCheck(
                    name, x <= 0, f"log of a value <= 0 in `{part.label}`", _DROP_HINT
                )
            elif part.transform == "log1p":
                checks[part.label] = _DomainCheck(
                    name, x <= -1, f"log1p of a value <= -1 in `{part.label}`", _DROP_HINT
                )
            elif part.transform == "sqrt":
                hint = _DROP_HINT.replace(" or use `log1p`", "")
                checks[part.label] = _DomainCheck(
                    name, x < 0, f"sqrt of a negative value in `{part.label}`", hint
                )
    if spec.weights is not None:
        # in SQL a plain name stands as it is and any other name goes in double quotes
        sql_name = spec.weights if _SQL_NAME.match(spec.weights) else f'"{spec.weights}"'
        checks[_W] = _DomainCheck(
            f"__check{len(checks)}",
            _as_float(spec.weights) <= 0,
            f"weight <= 0 in the weights column `{spec.weights}`",
            f"weights must be positive: filter them with `--where` (for example "
            f"`{sql_name} > 0`) or pass `--drop-invalid` to leave those rows out",
        )
    return list(checks.values())


def _quick_checks(
    spec: ModelSpec, schema: SchemaLike, level_ok: pl.Expr, checks: list[_DomainCheck]
) -> tuple[pl.Expr, ...]:
    """Build whole-batch reductions that show a batch needs no row dropped.

    They give: the number of nulls in the model columns, a sum of every float model
    column (finite only if no value is NaN or infinite; an overflowing sum only costs the
    slow path), whether every categorical level was seen, and whether any domain check
    fails. Per-row masks cost about 4 ms per 64k rows and 12 columns (measured), these
    reductions well under 1 ms, and most batches are clean.
    """
    columns = spec.model_columns()
    floats = [_as_float(c).sum() for c in columns if _is_float(schema[c])]
    return (
        pl.sum_horizontal([pl.col(c).null_count() for c in columns]).alias("nulls"),
        (pl.sum_horizontal(floats) if floats else pl.lit(0.0)).alias("total"),
        level_ok.all().alias("levels"),
        _any([check.bad for check in checks]).any().alias("bad"),
    )


def design_width(spec: ModelSpec, tables: Mapping[str, LevelTable]) -> int:
    """Count the design's columns.

    The intercept, one per numeric term, one per `poly` degree, and one indicator per
    non-reference level of each categorical.
    """
    width = int(spec.intercept)
    for term in spec.terms:
        if term.kind == "categorical" and term.column is not None:
            width += max(len(tables[term.column].levels) - 1, 0)
        elif term.transform == "poly" and term.arg is not None:
            width += term.arg
        else:
            width += 1
    return width


SQUARE_MATRICES_PER_WORKER = 12
"""Width-by-width float64 matrices one worker may hold at once, counted from the passes:
the factor, its inverse and the covariance (3), three HC meats (3), the two auxiliary tests'
factors with their pending Gram matrices (4), and a factor being merged (2)."""

MIN_BLOCK_ROWS = 4_096
"""Fewest rows of a written-out design block (`engine.passes.batch_rows_for`)."""


def design_memory_bytes(n_columns: int, batch_rows: int, n_workers: int, block_values: int) -> int:
    """Estimate the peak memory of a pass over a design of `n_columns` columns.

    Each worker holds `SQUARE_MATRICES_PER_WORKER` width-by-width matrices and one design
    block three times over (the polars frame, its float64 copy, the shifted copy the
    accumulator factors). A block written out whole (indicators included) has at most
    `block_values` values, and never more rows than a batch: the passes cut wider batches
    into such blocks, and keep categoricals as level codes where they can, so the block is
    the most a batch can cost.
    """
    width = n_columns + 2
    block_rows = min(batch_rows, max(block_values // width, MIN_BLOCK_ROWS))
    per_worker = SQUARE_MATRICES_PER_WORKER * width * width * 8 + 3 * block_rows * width * 8
    return n_workers * per_worker


def memory_text(n_bytes: float) -> str:
    """Write a byte count for a message: ``512 MiB``, ``7.5 GiB``, ``7,450 TiB``."""
    for unit in ("KiB", "MiB", "GiB"):
        n_bytes /= 1024
        if n_bytes < 1024:
            return f"{n_bytes:,.0f} {unit}" if n_bytes >= 100 else f"{n_bytes:.1f} {unit}"
    return f"{n_bytes / 1024:,.0f} TiB"


@dataclass(frozen=True)
class DesignBudget:
    """The memory a design may take, and the shape of the pass it is estimated for.

    Attributes
    ----------
    limit_bytes : int
        Most memory the pass's design may take (`design_memory_bytes`).
    batch_rows : int
        Rows per batch of the pass.
    n_workers : int
        Threads that each hold a factor and a batch.
    block_values : int
        Most values of a design block written out whole (the passes cut batches to it).
    """

    limit_bytes: int
    batch_rows: int
    n_workers: int
    block_values: int

    def need_bytes(self, n_columns: int) -> int:
        """Estimated peak memory of a pass over `n_columns` design columns."""
        return design_memory_bytes(n_columns, self.batch_rows, self.n_workers, self.block_values)

    def max_columns(self) -> int:
        """Most design columns that fit within the limit."""
        low, high = 0, 1
        while self.need_bytes(high) <= self.limit_bytes:
            low, high = high, 2 * high
        while high - low > 1:
            middle = (low + high) // 2
            if self.need_bytes(middle) <= self.limit_bytes:
                low = middle
            else:
                high = middle
        return low

    def check(self, spec: ModelSpec, tables: Mapping[str, LevelTable]) -> None:
        """Raise `DataError` in one line when the design would need more than the limit."""
        width = design_width(spec, tables)
        need = self.need_bytes(width)
        if need <= self.limit_bytes:
            return
        widest = max(tables.values(), key=lambda t: len(t.levels), default=None)
        culprit = (
            f"`{widest.column}` has {_level_count(widest)}"
            if widest is not None
            else f"{len(spec.terms)} terms"
        )
        partial = any(t.is_partial for t in tables.values())
        at_least = "at least " if partial else ""
        msg = (
            f"the design would have {at_least}{width:,} columns ({culprit}) and need "
            f"{at_least or 'about '}"
            f"{memory_text(need)} of memory, more than the limit of "
            f"{memory_text(self.limit_bytes)}; leave the column out or group its levels "
            "(`--where` can keep fewer), or raise the limit with `--max-memory`"
        )
        raise DataError(msg)


def _describe_levels(levels: list[str]) -> str:
    shown = ", ".join(f"`{level}`" for level in levels[:_SHOWN_LEVELS])
    more = len(levels) - _SHOWN_LEVELS
    return shown + (f" and {more} more" if more > 0 else "")


@dataclass(frozen=True)
class DesignBuilder:
    """Turns frames into design matrices with coding learned once from a sample.

    Build one with `DesignBuilder.learn`, not the constructor.

    Attributes
    ----------
    spec : ModelSpec
        The model.
    column_names : tuple of str
        Design column names: ``intercept`` first when the model has one, a numeric or
        transform term under its label, ``poly(x, 3)`` as ``x``, ``x^2``, ``x^3``, and a
        categorical as one dummy per non-reference level, ``depot=north`` (see
        `indicator_name`).
    term_of_column : tuple of str
        The term label of each design column (``intercept`` for the column of ones).
    numeric_predictors : tuple of str
        Source columns used by numeric, transform and interaction terms, in order (not
        the column of an indicator term such as ``depot=north``).
    levels : mapping of str to tuple of str
        Each categorical column's levels in natural order, reference included.
    level_tables : mapping of str to LevelTable
        Each categorical column's levels with the rows counted for each (the rows the
        levels and the reference were learned from).
    reference_levels : mapping of str to str
        Each categorical column's reference level (no indicator column).
    scaling : mapping of str to tuple of float
        For each ``std(x)`` term label, the sample mean and SD (ddof=1) it uses.
    """

    spec: ModelSpec
    column_names: tuple[str, ...]
    term_of_column: tuple[str, ...]
    numeric_predictors: tuple[str, ...]
    levels: Mapping[str, tuple[str, ...]]
    level_tables: Mapping[str, LevelTable]
    reference_levels: Mapping[str, str]
    scaling: Mapping[str, tuple[float, float]]
    _design: tuple[pl.Expr, ...] = field(repr=False, compare=False)
    _quick: tuple[pl.Expr, ...] = field(repr=False, compare=False)
    _masks: tuple[pl.Expr, ...] = field(repr=False, compare=False)
    _checks: tuple[_DomainCheck, ...] = field(repr=False, compare=False)
    _may_overflow: tuple[int, ...] = field(repr=False, compare=False)
    _coded: tuple[pl.Expr, ...] = field(repr=False, compare=False)
    """Dense design columns (no intercept, no indicators), target, weights."""
    _codes: tuple[pl.Expr, ...] = field(repr=False, compare=False)
    """Each categorical's level code (its position in `levels`; null: missing or unseen)."""
    _level_index: tuple[Mapping[str, int], ...] = field(repr=False, compare=False)
    """Each categorical's level -> its position in `levels`."""
    _dense_positions: NDArray[np.intp] = field(repr=False, compare=False)
    _level_positions: tuple[NDArray[np.intp], ...] = field(repr=False, compare=False)

    @staticmethod
    def scales_from_sample(spec: ModelSpec) -> bool:
        """Whether `learn` takes a standardisation (``std(x)``) from the sample.

        A full pass needs the sample for nothing else: it finds its levels as it reads.
        """
        return any(part.transform == "std" for term in spec.terms for part in _single_columns(term))

    @classmethod
    def learn(
        cls,
        spec: ModelSpec,
        schema: SchemaLike,
        sample: pl.DataFrame,
        *,
        level_tables: Mapping[str, LevelTable] | None = None,
        indicator_levels: Mapping[str, IndicatorLevel] | None = None,
        budget: DesignBudget | None = None,
    ) -> DesignBuilder:
        """Learn the coding of every term: levels and references, and `std()` scaling.

        A categorical's levels are those of `level_tables` (counted over every row of a
        full pass) or else of the sample rows with a value in that column; its reference is
        the one the spec names, else the level with the most of those rows, ties going to
        the first in natural order (`LevelTable.most_frequent`). An indicator term's level
        must be held by a row of `indicator_levels` (a full pass counts every row) or else
        of the sample. The mean and SD behind ``std(x)`` come from the sample rows that
        have a usable value in every model column and meet every domain check, i.e. the
        rows `build` would keep.

        Parameters
        ----------
        spec : ModelSpec
            A spec from `build_spec`.
        schema : mapping of str to polars data type
            The source's column types (they decide which values count as missing).
        sample : polars.DataFrame
            Rows holding at least the spec's model columns (target, terms, weights).
        level_tables : mapping of str to LevelTable, optional
            Levels counted over every row a full pass reads; None learns them from `sample`.
        indicator_levels : mapping of str to IndicatorLevel, optional
            Rows holding each indicator term's level, counted over every row a full pass
            reads (`IndicatorRows`); None counts them in `sample`.
        budget : DesignBudget, optional
            Memory the design may take; checked before any design column is made.

        Returns
        -------
        DesignBuilder

        Raises
        ------
        SpecError
            If a categorical column has more than ``spec.max_levels`` levels, a given
            reference level is not among its levels, no row holds an indicator term's
            level, or two design columns share a name.
        DataError
            If a categorical has fewer than two levels, a ``std`` term has no spread in
            the usable sample rows, or the design would need more memory than `budget`.
        """
        categorical = [t.column for t in spec.terms if t.kind == "categorical" and t.column]
        if level_tables is None:
            level_tables = count_levels(schema, categorical, sample)
            basis = "the sample"
        else:
            basis = "the rows read"
        tables = {c: _check_levels(spec, level_tables[c], basis) for c in categorical}
        indicators = indicator_parts([spec])
        if indicators:
            if indicator_levels is None:
                indicator_levels = count_indicator_rows(schema, indicators, sample)
                check_indicator_levels(indicator_levels, "the sample")
            else:
                check_indicator_levels(indicator_levels, "the rows read")
        if budget is not None:
            budget.check(spec, tables)
        present = _all([present_value(c, schema[c]) for c in spec.model_columns()])
        checks = _domain_checks(spec)
        usable = sample.filter(present & ~_any([c.bad for c in checks]).fill_null(value=False))

        names: list[str] = [INTERCEPT] if spec.intercept else []
        owners: list[str] = [INTERCEPT] if spec.intercept else []
        design: list[pl.Expr] = [pl.lit(1.0, dtype=pl.Float64).alias(INTERCEPT)]
        design = design if spec.intercept else []
        levels: dict[str, tuple[str, ...]] = {}
        references: dict[str, str] = {}
        scaling: dict[str, tuple[float, float]] = {}
        level_ok: list[pl.Expr] = []
        may_overflow: list[int] = []

        def single(term: Term) -> pl.Expr:
            column = term.column
            assert column is not None  # callers pass one-column terms
            if term.kind == "indicator":
                return indicator_match(term, schema[column])
            x = _as_float(column)
            match term.transform:
                case None:
                    return x
                case "log":
                    return x.log()
                case "log1p":
                    return x.log1p()
                case "sqrt":
                    return x.sqrt()
                case "square":
                    return x * x
                case "pow":
                    assert term.arg is not None  # the parser sets the power
                    return x.pow(term.arg)
                case "std":
                    if term.label not in scaling:
                        scaling[term.label] = _learn_scaling(usable, term)
                    mean, sd = scaling[term.label]
                    return (x - mean) / sd
                case other:
                    msg = f"transform `{other}` of `{term.label}` cannot enter an interaction"
                    raise SpecError(msg)

        for term in spec.terms:
            if term.kind == "categorical":
                column = term.column
                assert column is not None  # categorical terms have a column
                table = tables[column]
                found, reference = table.levels, reference_level(spec, table)
                levels[column] = found
                references[column] = reference
                in_levels, equal = _match_levels(column, schema[column], found)
                level_ok.append(in_levels)
                for level, is_level in zip(found, equal, strict=True):
                    if level != reference:
                        name = indicator_name(column, level)
                        design.append(is_level.cast(pl.Float64).alias(name))
                        names.append(name)
                        owners.append(term.label)
            elif term.transform == "poly":
                column = term.column
                assert column is not None and term.arg is not None  # set by the parser
                for power in range(1, term.arg + 1):
                    name = quote_name(column) + (f"^{power}" if power > 1 else "")
                    may_overflow.append(len(names))
                    design.append(_as_float(column).pow(power).alias(name))
                    names.append(name)
                    owners.append(term.label)
            else:
                parts = _single_columns(term)
                expr = single(parts[0])
                for part in parts[1:]:
                    expr = expr * single(part)
                if term.kind == "interaction" or term.transform in _OVERFLOW_TRANSFORMS:
                    may_overflow.append(len(names))
                design.append(expr.alias(term.label))
                names.append(term.label)
                owners.append(term.label)

        seen: set[str] = set()
        for name in names:
            if name in seen:
                msg = (
                    f"two design columns are both named `{name}`; a term repeats another "
                    "(for example `x` next to `poly(x, 2)`): remove one"
                )
                raise SpecError(msg)
            seen.add(name)

        design.append(single(target_term(spec)).alias(_Y))
        if spec.weights is not None:
            design.append(_as_float(spec.weights).alias(_W))
        predictors = [
            part.column
            for term in spec.terms
            if term.kind != "categorical"
            for part in _single_columns(term)
            if part.column is not None and part.kind != "indicator"
        ]
        index = {name: i for i, name in enumerate(names)}
        categorical_columns = list(levels)
        indicator_at = {
            index[indicator_name(c, level)]
            for c in categorical_columns
            for level in levels[c]
            if level != references[c]
        }
        dense_positions = [
            i for i in range(int(spec.intercept), len(names)) if i not in indicator_at
        ]
        level_positions = tuple(
            np.array(
                [
                    -1 if level == references[c] else index[indicator_name(c, level)]
                    for level in levels[c]
                ],
                dtype=np.intp,
            )
            for c in categorical_columns
        )
        codes = [
            level_code(c, schema[c], pl.Enum(list(levels[c]))).alias(f"__code_{k}")
            for k, c in enumerate(categorical_columns)
        ]
        coded = (
            *[design[i] for i in dense_positions],
            *design[len(names) :],  # target and weights
        )
        return cls(
            spec=spec,
            column_names=tuple(names),
            term_of_column=tuple(owners),
            numeric_predictors=tuple(dict.fromkeys(predictors)),
            levels=MappingProxyType(levels),
            level_tables=MappingProxyType(tables),
            reference_levels=MappingProxyType(references),
            scaling=MappingProxyType(scaling),
            _design=tuple(design),
            _quick=_quick_checks(spec, schema, _all(level_ok), checks),
            _masks=(
                present.alias(_PRESENT),
                _all(level_ok).fill_null(value=False).alias(_IN_LEVELS),
                *[check.bad.fill_null(value=False).alias(check.name) for check in checks],
            ),
            _checks=tuple(checks),
            _may_overflow=tuple(may_overflow),
            _coded=coded,
            _codes=tuple(codes),
            _level_index=tuple(
                MappingProxyType({level: k for k, level in enumerate(levels[c])})
                for c in categorical_columns
            ),
            _dense_positions=np.array(dense_positions, dtype=np.intp),
            _level_positions=level_positions,
        )

    def build(self, frame: pl.DataFrame) -> DesignBatch:
        """Turn one batch into a design matrix, target and weights.

        Rows with a null, NaN or infinite value in a model column are dropped first, then
        rows whose categorical level was not in the sample, then (only with
        ``spec.drop_invalid``) rows outside a transform's domain, with weight <= 0, or
        whose design values overflow float64. Each row is counted once, under the first
        reason that applies.

        Parameters
        ----------
        frame : polars.DataFrame
            A batch holding the spec's source columns and `ROW_INDEX`.

        Returns
        -------
        DesignBatch

        Raises
        ------
        DataError
            Without ``spec.drop_invalid``: for a value outside a transform's domain (log
            of a value <= 0, sqrt of a negative, log1p of a value <= -1), a weight <= 0,
            or a design value too large for float64, with the row count in this batch.
        """
        n_missing = n_unseen = n_domain = 0
        values = None
        if not self.levels and not self._checks:
            # Only missing values can drop a row: the design itself shows whether there are
            # any (nulls come out as NaN), and most batches have none.
            values = frame.select(self._design).to_numpy(order="fortran", writable=True)
            with np.errstate(over="ignore", invalid="ignore"):
                total = float(values.sum())
            if not math.isfinite(total):  # an overflowing sum only costs the slow path
                values = None
                frame, n_missing, n_unseen, n_domain = self._drop_rows(frame)
        else:
            n_nulls, total, all_in_levels, any_bad = frame.select(self._quick).row(0)
            if not (n_nulls == 0 and math.isfinite(total) and all_in_levels and not any_bad):
                frame, n_missing, n_unseen, n_domain = self._drop_rows(frame)
        if values is None:
            values = frame.select(self._design).to_numpy(order="fortran", writable=True)
        if self._may_overflow and not np.isfinite(values[:, self._may_overflow]).all():
            values, frame, n_overflow = self._drop_overflow(values, frame)
            n_domain += n_overflow
        p = len(self.column_names)
        return DesignBatch(
            x=values[:, :p],
            y=values[:, p],
            weights=values[:, p + 1] if self.spec.weights is not None else None,
            rows=frame.get_column(ROW_INDEX).cast(pl.Int64).to_numpy(),
            frame=frame,
            n_dropped_missing=n_missing,
            n_dropped_domain=n_domain,
            n_dropped_unseen_level=n_unseen,
        )

    @property
    def coded_positions(self) -> tuple[NDArray[np.intp], tuple[NDArray[np.intp], ...]]:
        """Design columns of the dense columns, and of each categorical's levels (-1: none)."""
        return self._dense_positions, self._level_positions

    @property
    def indicator_positions(self) -> tuple[int, ...]:
        """Design columns that are indicators of a categorical's levels."""
        return tuple(int(i) for p in self._level_positions for i in p if i >= 0)

    def build_coded(self, frame: pl.DataFrame) -> CodedBatch | None:
        """Turn one batch into dense columns and level codes, dropping rows as `build` does.

        The indicators of a categorical are never written out: each row keeps one small
        integer, its level (`triage.core.indicators`). None for a design without a
        categorical, or when a value overflowed float64 (`build` then drops or reports it).

        Parameters
        ----------
        frame : polars.DataFrame
            A batch holding the spec's source columns and `ROW_INDEX`.

        Returns
        -------
        CodedBatch or None

        Raises
        ------
        DataError
            As `build`.
        """
        if not self.levels:
            return None
        q = self._dense_positions.size
        n_values = q + 1 + int(self.spec.weights is not None)
        selected = frame.select(*self._coded, *self._masks[:1], *self._masks[2:])
        columns = selected.get_columns()
        present = columns[n_values].to_numpy()
        codes = self._level_codes(frame)
        known = np.logical_and.reduce([code >= 0 for code in codes])
        bad = np.zeros(frame.height, dtype=np.bool_)
        for series in columns[n_values + 1 :]:
            bad |= series.to_numpy()
        usable = present & known
        n_missing = n_unseen = n_domain = 0
        if not (usable.all() and not bad.any()):
            if not self.spec.drop_invalid and (usable & bad).any():
                self._drop_rows(frame)  # raises, saying which check failed and how often
            keep = usable & ~bad
            n_missing = int(np.count_nonzero(~present))
            n_unseen = int(np.count_nonzero(present & ~known))
            n_domain = int(np.count_nonzero(usable & bad))
            kept = pl.Series(keep)
            code_series = [pl.Series(f"__code_{k}", code) for k, code in enumerate(codes)]
            frame = frame.filter(kept)
            columns = pl.DataFrame([*columns[:n_values], *code_series]).filter(kept).get_columns()
            codes = [series.to_numpy() for series in columns[n_values:]]
        dense = [series.to_numpy() for series in columns[:q]]
        if self._may_overflow and not all(np.isfinite(column).all() for column in dense):
            return None
        design = CodedDesign(
            dense=dense,
            dense_positions=self._dense_positions,
            factors=[
                IndicatorCodes(codes=code.astype(np.intp, copy=False), positions=positions)
                for code, positions in zip(codes, self._level_positions, strict=True)
            ],
            n_cols=len(self.column_names),
            has_intercept=self.spec.intercept,
        )
        return CodedBatch(
            design=design,
            y=columns[q].to_numpy(),
            weights=columns[q + 1].to_numpy() if self.spec.weights is not None else None,
            rows=frame.get_column(ROW_INDEX).cast(pl.Int64).to_numpy(),
            frame=frame,
            n_dropped_missing=n_missing,
            n_dropped_domain=n_domain,
            n_dropped_unseen_level=n_unseen,
        )

    def _level_codes(self, frame: pl.DataFrame) -> list[NDArray[np.int64]]:
        """Each categorical's level code per row (its position in `levels`), -1 if none.

        Text read dictionary-encoded is coded through its ids (`category_codes`): 2,000,000
        rows of three code columns cost 0.065 CPU-s cast to the levels (measured here).
        """
        codes = []
        for column, expr, index in zip(self.levels, self._codes, self._level_index, strict=True):
            series = frame.get_column(column)
            if series.dtype == pl.Categorical:
                code, _ = category_codes(series, functools.partial(positions_in, index))
            else:
                code = frame.select(expr).to_series().cast(pl.Int64).fill_null(-1).to_numpy()
            codes.append(code)
        return codes

    def build_columns(self, frame: pl.DataFrame) -> DesignColumns | None:
        """Return the batch's design as separate columns, not copied, or None to use `build`.

        For a pass that copies each column once anyway, as pass 1 does while shifting it
        (`QRAccumulator.update_columns`). None when a row might have to be dropped for a
        reason only `build` checks: a null, a categorical level, a domain check or a
        weight. NaN and infinite values are not looked for here; the accumulator finds
        them, and the caller then passes the batch through `build`.

        Parameters
        ----------
        frame : polars.DataFrame
            A batch holding the spec's source columns.

        Returns
        -------
        DesignColumns or None
        """
        if self.levels or self._checks or self.spec.weights is not None:
            return None
        design = frame.select(self._design[1:] if self.spec.intercept else self._design)
        if any(series.has_nulls() for series in design.get_columns()):
            return None
        *predictors, y = (series.to_numpy() for series in design.get_columns())
        return DesignColumns(predictors=predictors, y=y)

    def row_status(self, frame: pl.DataFrame) -> pl.Series:
        """Say for each row whether `build` keeps it, or the first reason it leaves it out.

        The reasons and their order are those `build` counts: ``missing value``,
        ``level not in the fit``, ``outside a transform's domain``; a kept row is ``used``.
        A row whose design values overflow float64 is found only by `build`.

        Parameters
        ----------
        frame : polars.DataFrame
            Rows holding the spec's source columns.

        Returns
        -------
        polars.Series
            Text, one value per row of `frame`, named ``status``.
        """
        masks = frame.select(self._masks)
        bad = _any([pl.col(check.name) for check in self._checks])
        status = (
            pl.when(~pl.col(_PRESENT))
            .then(pl.lit(STATUS_MISSING))
            .when(~pl.col(_IN_LEVELS))
            .then(pl.lit(STATUS_UNSEEN))
            .when(bad)
            .then(pl.lit(STATUS_DOMAIN))
            .otherwise(pl.lit(STATUS_USED))
        )
        return masks.select(status.alias("status")).to_series()

    def _drop_rows(self, frame: pl.DataFrame) -> tuple[pl.DataFrame, int, int, int]:
        """Drop unusable rows and count them (missing, unseen level, domain), or raise."""
        masks = frame.select(self._masks)
        present, in_levels = pl.col(_PRESENT), pl.col(_IN_LEVELS)
        usable = present & in_levels
        bad = _any([pl.col(check.name) for check in self._checks])
        counts = masks.select(
            (~present).sum().alias(_MISSING),
            (present & ~in_levels).sum().alias(_UNSEEN),
            (usable & bad).sum().alias(_DOMAIN),
            *[(usable & pl.col(check.name)).sum().alias(check.name) for check in self._checks],
        ).row(0, named=True)
        if not self.spec.drop_invalid:
            for check in self._checks:
                n_bad = int(counts[check.name])
                if n_bad:
                    msg = f"{check.problem} for {counted(n_bad, 'row')} in this batch; {check.hint}"
                    raise DataError(msg)
        keep = masks.select(usable & ~bad).to_series()
        return (
            frame.filter(keep),
            int(counts[_MISSING]),
            int(counts[_UNSEEN]),
            int(counts[_DOMAIN]),
        )

    def _drop_overflow(
        self, values: NDArray[np.float64], frame: pl.DataFrame
    ) -> tuple[NDArray[np.float64], pl.DataFrame, int]:
        """Drop rows whose design values overflowed float64, or raise without drop_invalid."""
        p = len(self.column_names)
        finite = np.isfinite(values[:, :p])
        keep = finite.all(axis=1)
        n_bad = int(keep.size - np.count_nonzero(keep))
        if not self.spec.drop_invalid:
            columns = np.flatnonzero(~finite.all(axis=0))
            labels = dict.fromkeys(self.term_of_column[int(i)] for i in columns)
            where = ", ".join(f"`{label}`" for label in labels)
            msg = (
                f"values too large for float64 in {where} for {counted(n_bad, 'row')} in this "
                "batch; "
                "rescale the column (for example with `std(...)`), filter the rows with "
                "`--where`, or pass `--drop-invalid` to leave those rows out"
            )
            raise DataError(msg)
        return np.asfortranarray(values[keep]), frame.filter(pl.Series(keep)), n_bad


def reference_level(spec: ModelSpec, table: LevelTable) -> str:
    """Return a categorical's reference: the one the spec names, else its most frequent level."""
    return spec.reference.get(table.column) or table.most_frequent()


def _level_count(table: LevelTable) -> str:
    """Write a level count: `12 levels`, or `at least 16,384 levels` when counting stopped."""
    at_least = "at least " if table.is_partial else ""
    return f"{at_least}{len(table.levels):,} levels"


def _check_levels(spec: ModelSpec, table: LevelTable, basis: str) -> LevelTable:
    """Check a categorical's level count and named reference; return the table."""
    column, found = table.column, table.levels
    if len(found) > spec.max_levels:
        if 2 * len(found) > table.n_rows:
            hint = (
                "it has nearly one level per row, like an identifier: leave it out of the "
                "model (a limit raised with `--max-levels` would not make it a useful term)"
            )
        else:
            hint = "raise the limit with `--max-levels` or filter the rows with `--where`"
        msg = (
            f"categorical column `{column}` has {_level_count(table)} in {basis}, more than "
            f"the limit of {spec.max_levels}; {hint}"
        )
        raise SpecError(msg)
    if len(found) < 2:
        got = f"only the level `{found[0]}`" if found else "no values"
        kept = f" kept by the filter `{spec.where}`" if spec.where else ""
        msg = (
            f"categorical term `{quote_name(column)}` has {got} in {basis}{kept}; it needs "
            "at least two levels: remove the term or widen the rows"
        )
        raise DataError(msg)
    reference = spec.reference.get(column)
    if reference is not None and reference not in found:
        msg = (
            f"reference level `{reference}` for `{column}` is not among its levels in "
            f"{basis}: {_describe_levels(list(found))}; choose one of those"
        )
        raise SpecError(msg)
    return table


def _learn_scaling(usable: pl.DataFrame, term: Term) -> tuple[float, float]:
    """Mean and SD (ddof=1) of the column behind a ``std(x)`` term in the usable rows."""
    column = term.column
    assert column is not None  # std terms have a column
    stats = usable.select(
        _as_float(column).mean().alias("mean"), _as_float(column).std(ddof=1).alias("sd")
    ).row(0)
    mean, sd = stats
    if mean is None or sd is None or not np.isfinite(sd) or sd <= 0:
        msg = (
            f"`{term.label}` cannot be standardised: `{column}` has no spread in the usable "
            f"sample rows ({usable.height:,} rows); use the bare column or widen the sample"
        )
        raise DataError(msg)
    return float(mean), float(sd)


@dataclass(frozen=True)
class OpenBatch:
    """One batch of a pass whose levels are being found (`OpenLevelDesign.build`).

    Attributes
    ----------
    dense : list of ndarray of shape (n_rows,)
        The design columns that are neither the intercept nor indicators, float64.
    y, weights
        As for `DesignBatch`.
    codes : list of ndarray of shape (n_rows,)
        Each row's level of each categorical, numbered as found (`FoundLevels`).
    n_dropped_missing, n_dropped_domain : int
        As for `DesignBatch`.
    """

    dense: list[NDArray[np.float64]]
    y: NDArray[np.float64]
    weights: NDArray[np.float64] | None
    codes: list[NDArray[np.int64]]
    n_dropped_missing: int
    n_dropped_domain: int
    n_dropped_unseen_level: int = 0
    """Always 0: every level is found."""

    @property
    def n_rows(self) -> int:
        """Number of rows kept."""
        return int(self.y.shape[0])


@dataclass(frozen=True)
class OpenLevelDesign:
    """A full pass's design while the levels of its categoricals are still being found.

    The pass codes each batch's categoricals against the levels found so far and adds the
    levels it meets (`FoundLevels`), so no pass has to count them first; `finish` then
    learns the `DesignBuilder` from every level found, with the usual reference rule. The
    other columns, the target, weights and checks are those of the design without its
    categorical terms (`numeric`), learned from the sample rows that have every model value.

    Build one with `learn`.
    """

    spec: ModelSpec
    numeric: DesignBuilder
    """The design of the model without its categorical terms."""
    categorical: tuple[str, ...]
    dtypes: tuple[pl.DataType | type[pl.DataType], ...]
    cap: int
    """Most levels a column may reach before the pass is refused (`_check_levels`)."""
    budget: DesignBudget | None
    indicator_levels: Mapping[str, IndicatorLevel] | None
    """As for `DesignBuilder.learn`."""

    @classmethod
    def learn(
        cls,
        spec: ModelSpec,
        schema: SchemaLike,
        sample: pl.DataFrame,
        *,
        cap: int,
        indicator_levels: Mapping[str, IndicatorLevel] | None = None,
        budget: DesignBudget | None = None,
    ) -> OpenLevelDesign:
        """Learn everything but the levels (see `DesignBuilder.learn`); `cap` as the attribute."""
        categorical = tuple(t.column for t in spec.terms if t.kind == "categorical" and t.column)
        numeric_spec = dataclasses.replace(
            spec, terms=tuple(t for t in spec.terms if t.kind != "categorical")
        )
        # the rows `DesignBuilder.learn` takes a `std(x)` scaling from have every categorical
        present = _all([present_value(c, schema[c]) for c in categorical])
        numeric = DesignBuilder.learn(
            numeric_spec, schema, sample.filter(present), indicator_levels=indicator_levels
        )
        dtypes = tuple(schema[c] for c in categorical)
        return cls(spec, numeric, categorical, dtypes, cap, budget, indicator_levels)

    def new_levels(self) -> list[FoundLevels]:
        """Return no levels yet for each categorical, to start a part of the pass."""
        return [
            FoundLevels(c, dtype) for c, dtype in zip(self.categorical, self.dtypes, strict=True)
        ]

    def build(self, frame: pl.DataFrame, levels: Sequence[FoundLevels]) -> OpenBatch:
        """Code one batch, adding the levels it holds for the first time to `levels`.

        Every row with a value in a categorical counts for its level, whatever its other
        values; rows are then dropped and counted as `DesignBuilder.build` does.

        Raises
        ------
        DataError, SpecError
            As `DesignBuilder.build`; and as `DesignBuilder.learn` when a column's levels
            pass `cap`.
        """
        numeric = self.numeric
        values = numeric._design[int(self.spec.intercept) :]
        n_values = len(values)
        selected = frame.select(
            *values,
            numeric._masks[0].alias(_PRESENT),
            _any(list(numeric._masks[2:])).alias(_DOMAIN),
        )
        codes, found = self._found_codes(frame, levels)
        value_columns, masks = selected.get_columns()[:n_values], selected.get_columns()[n_values:]
        present = np.logical_and.reduce([masks[0].to_numpy(), *found])
        bad = masks[1].to_numpy()
        n_missing = n_domain = 0
        if not (present.all() and not bad.any()):
            if not self.spec.drop_invalid and (present & bad).any():
                numeric._drop_rows(frame.filter(pl.Series(present)))  # raises, saying why
            keep = present & ~bad
            n_missing = int(np.count_nonzero(~present))
            n_domain = int(np.count_nonzero(present & bad))
            # one polars filter of values and codes: numpy's boolean indexing of each
            # column cost about 6 times as much (measured here)
            code_series = [pl.Series(f"__code_{k}", code) for k, code in enumerate(codes)]
            kept = pl.DataFrame([*value_columns, *code_series]).filter(pl.Series(keep))
            value_columns = kept.get_columns()[:n_values]
            codes = [series.to_numpy() for series in kept.get_columns()[n_values:]]
        columns = [series.to_numpy() for series in value_columns]
        overflow = [p - int(self.spec.intercept) for p in numeric._may_overflow]
        if overflow and not all(np.isfinite(columns[j]).all() for j in overflow):
            finite = np.logical_and.reduce([np.isfinite(columns[j]) for j in overflow])
            if not self.spec.drop_invalid:
                p = len(numeric.column_names)
                intercept = [np.ones(finite.size)] if self.spec.intercept else []
                x = np.column_stack([*intercept, *columns[: p - len(intercept)]])
                numeric._drop_overflow(x, frame)  # raises, naming the terms
            n_domain += int(np.count_nonzero(~finite))
            columns = [column[finite] for column in columns]
            codes = [code[finite] for code in codes]
        q = n_values - 1 - int(self.spec.weights is not None)
        return OpenBatch(
            dense=columns[:q],
            y=columns[q],
            weights=columns[q + 1] if self.spec.weights is not None else None,
            codes=codes,
            n_dropped_missing=n_missing,
            n_dropped_domain=n_domain,
        )

    def count(self, frame: pl.DataFrame, levels: Sequence[FoundLevels]) -> None:
        """Find and count the levels of rows that are not fitted (rows the user marked)."""
        self._found_codes(frame, levels)

    def _found_codes(
        self, frame: pl.DataFrame, levels: Sequence[FoundLevels]
    ) -> tuple[list[NDArray[np.int64]], list[NDArray[np.bool_]]]:
        """Each categorical's codes and rows with a value, new levels added and counted."""
        codes, found = [], []
        for lv in levels:
            code, present = lv.find(frame)
            # before a refusal, whose wording reads the counts
            lv.count(code if present.all() else code[present])
            if len(lv) > self.cap:
                self._refuse(levels)
            codes.append(code)
            found.append(present)
        return codes, found

    def _refuse(self, levels: Sequence[FoundLevels]) -> None:
        """Raise as `DesignBuilder.learn` would for a column whose levels passed `cap`."""
        tables = {lv.column: lv.table(is_partial=True)[0] for lv in levels}
        for table in tables.values():
            if len(table.levels) > self.spec.max_levels:
                _check_levels(self.spec, table, "the rows read")
        if self.budget is not None:
            self.budget.check(self.spec, tables)

    def finish(
        self, levels: Sequence[FoundLevels], schema: SchemaLike, sample: pl.DataFrame
    ) -> tuple[DesignBuilder, list[NDArray[np.intp]]]:
        """Learn the design from the levels found over the pass (see `DesignBuilder.learn`).

        Returns the builder and, per categorical, the design column of each level in the
        order found (-1 for the reference level).
        """
        found = [lv.table() for lv in levels]
        builder = DesignBuilder.learn(
            self.spec,
            schema,
            sample,
            level_tables={table.column: table for table, _ in found},
            indicator_levels=self.indicator_levels,
            budget=self.budget,
        )
        dense_positions, level_positions = builder.coded_positions
        dense_names = [builder.column_names[i] for i in dense_positions]
        assert dense_names == list(self.numeric.column_names[int(self.spec.intercept) :])
        return builder, [
            positions[natural]
            for positions, (_, natural) in zip(level_positions, found, strict=True)
        ]
