"""Model specification: the target, the terms, weights, filter and categorical coding.

Terms are written either as a comma list (``distance_km, log(weight_kg), depot,
stops:weight_kg``) or in the Wilkinson–Rogers form (``minutes ~ distance_km + depot +
stops:weight_kg``), where ``a*b`` means ``a + b + a:b``. A small hand-written tokenizer
and recursive-descent parser read them; nothing is ever evaluated as Python.
"""

from __future__ import annotations

import datetime
import math
import re
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import TYPE_CHECKING, Final, Literal, NoReturn, TypeAlias, cast

import polars as pl

from triage.core.filter import closest_names_hint, filter_columns, parse_filter
from triage.errors import SpecError

if TYPE_CHECKING:
    from collections.abc import Callable, Mapping, Sequence

    from triage._typing import TermKind

Transform: TypeAlias = Literal["log", "log1p", "sqrt", "square", "pow", "poly", "std"]
"""A numeric transform applied to one column."""

SchemaLike: TypeAlias = "Mapping[str, pl.DataType | type[pl.DataType]]"
"""Column name -> polars data type, as `polars.Schema` or a plain dict."""

ONE_ARG_TRANSFORMS: Final = frozenset({"log", "log1p", "sqrt", "square", "std"})
"""Transforms written `f(x)`."""

POWER_TRANSFORMS: Final = frozenset({"pow", "poly"})
"""Transforms written `f(x, k)` with an integer `k` >= 2."""

TARGET_TRANSFORMS: Final = frozenset({"log", "log1p", "sqrt"})
"""Transforms a target may take (``log(cost) ~ ...``)."""

_TARGET_CALL = re.compile(r"(log1p|log|sqrt)\(\s*(`[^`]+`|[^()`]+?)\s*\)\Z")
_CAT: Final = "cat"
_KNOWN_FUNCTIONS: Final = "log, log1p, sqrt, square, pow, poly, std, cat"
_PLAIN_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_.]*\Z")
_PLAIN_LEVEL = re.compile(r"[^\s,+~*:()^`\[\]]+")
"""A level written bare after ``column=``; any other is written in backticks."""
_BRACKET_INDICATOR: Final = re.compile(r"(.+?)\[(.*)\]")
"""The bracket form ``depot[north]`` of an indicator name, still accepted as input."""
_LEVEL = re.compile(
    r"\s*(?:=\s*(?:`(?P<quoted>[^`]*)`|(?P<bare>[^\s,+~*:()^`\[\]]+))|\[(?P<bracket>[^\]]*)\])"
)
"""The level after a column name: ``=north``, ``=`north east```, or the older ``[north]``."""
_TOKEN = re.compile(
    r"\s*(?:(?P<name>[A-Za-z_][A-Za-z0-9_.]*)|`(?P<quoted>[^`]*)`|(?P<number>\d+(?:\.\d*)?)"
    r"|(?P<punct>[(),~+*:^]))"
)


@dataclass(frozen=True)
class Term:
    """One model term: a column, a transform, a categorical, an indicator, or an interaction.

    Attributes
    ----------
    label : str
        Canonical text of the term, which parses back to the same term: ``distance_km``,
        ``log(weight_kg)``, ``pow(x, 3)``, ``stops:weight_kg``, ``depot``. Names that are
        not plain identifiers are quoted with backticks.
    kind : TermKind
        ``numeric``, ``transform``, ``interaction``, ``categorical`` or ``indicator``
        (``depot=north``: one 0/1 column, 1 where `column` holds `level`).
    column : str or None
        The source column; None for an interaction.
    transform : Transform or None
        The transform applied to `column`, if any.
    arg : int or None
        The power of ``pow`` or the degree of ``poly``.
    factors : tuple of Term
        The two terms multiplied by an interaction; empty otherwise.
    level : str or None
        The level of an indicator, as the column's values read as text (`month=3`,
        `flag=true`) once `build_spec` has read it in the column's type; None otherwise.
    """

    label: str
    kind: TermKind
    column: str | None = None
    transform: Transform | None = None
    arg: int | None = None
    factors: tuple[Term, ...] = ()
    level: str | None = None

    @property
    def columns(self) -> tuple[str, ...]:
        """Source columns this term reads, in order."""
        if self.column is not None:
            return (self.column,)
        return tuple(dict.fromkeys(c for f in self.factors for c in f.columns))


@dataclass(frozen=True)
class ModelSpec:
    """A validated model: what to predict, from which terms, on which rows.

    Attributes
    ----------
    target : str
        The numeric column to predict.
    terms : tuple of Term
        The model terms, kinds resolved against the schema.
    intercept : bool, default=True
        Whether the design has a leading column of ones.
    weights : str or None, default=None
        A numeric column of positive case weights.
    where : str or None, default=None
        Filter text (SQL expression) selecting the rows to fit.
    categorical : tuple of str, default=()
        Columns treated as categorical whatever their type.
    reference : mapping of str to str
        Column -> reference level for dummy coding; other categoricals use their most
        frequent level in the sample.
    max_levels : int, default=50
        Most levels a categorical column may have in the rows it is learned from.
    max_memory : int or None, default=None
        Most bytes a pass's design may take (checked before it is built); None for the
        engine's default, a share of the machine's memory.
    drop_invalid : bool, default=False
        Leave out rows outside a transform's domain or with weight <= 0 instead of failing.
    target_transform : {"log", "log1p", "sqrt"} or None, default=None
        A transform of the target (``log(cost) ~ ...``): the model fits the transformed
        values, so residuals, fitted values and worst rows are on that scale.
    """

    target: str
    terms: tuple[Term, ...]
    intercept: bool = True
    weights: str | None = None
    where: str | None = None
    categorical: tuple[str, ...] = ()
    reference: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}), hash=False)
    max_levels: int = 50
    max_memory: int | None = None
    drop_invalid: bool = False
    target_transform: Transform | None = None

    @property
    def target_label(self) -> str:
        """The target as the model fits it: ``minutes``, or ``log(minutes)``."""
        name = quote_name(self.target)
        return f"{self.target_transform}({name})" if self.target_transform else name

    def model_columns(self) -> tuple[str, ...]:
        """Columns whose values enter the fit: target, term columns, weights, in that order."""
        names = [self.target, *(c for t in self.terms for c in t.columns)]
        if self.weights is not None:
            names.append(self.weights)
        return tuple(dict.fromkeys(names))

    def source_columns(self) -> tuple[str, ...]:
        """Every column the model reads: target, term columns, weights, filter columns."""
        where = filter_columns(self.where) if self.where is not None else ()
        return tuple(dict.fromkeys((*self.model_columns(), *where)))


def quote_name(name: str) -> str:
    """Write a column name as it appears in term text, in backticks unless plain.

    Parameters
    ----------
    name : str
        A column name.

    Returns
    -------
    str
        `name` itself when it is an identifier (letters, digits, ``_``, ``.``), else
        the name in backticks.
    """
    return name if _PLAIN_NAME.match(name) else f"`{name}`"


def indicator_name(column: str, level: str) -> str:
    """Name the indicator (dummy) column of one level of a column: ``column=level``.

    Every view, export and JSON document shows an indicator under this one name, and
    the same text typed as a term makes that one column: ``vehicle=cargo_bike`` reads as
    "the rows where `vehicle` is `cargo_bike`". The column is written as `quote_name`
    does; a level holding a space or one of ``,+~*:()^[]`` is put in backticks.

    Parameters
    ----------
    column : str
        The column.
    level : str
        The level the indicator is 1 for, as the column's values read as text.

    Returns
    -------
    str
        ``column=level``.

    Examples
    --------
    >>> indicator_name("vehicle", "cargo_bike"), indicator_name("pick up", "north east")
    ('vehicle=cargo_bike', '`pick up`=`north east`')
    """
    shown = level if _PLAIN_LEVEL.fullmatch(level) else f"`{level}`"
    return f"{quote_name(column)}={shown}"


def split_indicator_name(text: str) -> tuple[str, str] | None:
    """Read an indicator name typed by a user back into (column, level).

    Accepts our form ``depot=north`` and, for older notes and scripts, ``depot[north]``.
    A backticked column name or level is unquoted.

    Parameters
    ----------
    text : str
        The typed name.

    Returns
    -------
    tuple of (str, str) or None
        The column and the level (both stripped), or None when `text` is neither form.
    """
    text = text.strip()
    bracket = _BRACKET_INDICATOR.fullmatch(text)
    if bracket is not None:
        column, level = bracket.group(1), bracket.group(2)
    else:
        column, sep, level = text.partition("=")
        if not sep:
            return None
    column, level = _unquote(column.strip()), _unquote(level.strip())
    return (column, level) if column else None


def _unquote(text: str) -> str:
    """Remove one pair of backticks around `text`, if it has them."""
    return text[1:-1] if len(text) > 1 and text.startswith("`") and text.endswith("`") else text


# ---------------------------------------------------------------------------------------------
# tokenizer and parser


@dataclass(frozen=True)
class _Token:
    kind: Literal["name", "level", "number", "punct", "end"]
    text: str
    start: int
    end: int


def _tokenize(text: str) -> list[_Token]:
    tokens: list[_Token] = []
    pos = 0
    stripped_end = len(text.rstrip())
    while pos < stripped_end:
        level = _LEVEL.match(text, pos) if tokens and tokens[-1].kind == "name" else None
        if level is not None:
            read = next(g for g in level.group("quoted", "bare", "bracket") if g is not None)
            tokens.append(_Token("level", read, pos, level.end()))
            pos = level.end()
            continue
        match = _TOKEN.match(text, pos)
        if match is None:
            bad = text[pos:].lstrip()
            where = len(text) - len(bad)
            if bad.startswith("`"):
                msg = f"unclosed backtick at position {where + 1} in terms `{text}`"
            elif bad.startswith("-"):
                msg = (
                    f"`-` at position {where + 1} in terms `{text}`: terms cannot be removed; "
                    "the intercept is a separate option of the model, on by default"
                )
            elif bad[0] in "=[" and tokens and tokens[-1].kind == "name":
                written = text[tokens[-1].start : where + 1]
                msg = (
                    f"expected a level after `{written}` in terms `{text}`, such as "
                    f"`{tokens[-1].text}=north`; put a level with spaces or `,+~*:()^[]` "
                    "in backticks"
                )
            elif bad[0] in "=[":
                msg = (
                    f"unexpected `{bad[0]}` at position {where + 1} in terms `{text}`; "
                    "an indicator is a column name and a level, such as `depot=north`"
                )
            else:
                msg = (
                    f"unexpected `{bad[0]}` at position {where + 1} in terms `{text}`; "
                    "terms are separated by `,` (or `+` after `~`)"
                )
            raise SpecError(msg)
        start = match.start(match.lastgroup) if match.lastgroup else pos
        if match.group("quoted") is not None:
            if not match.group("quoted"):
                msg = f"empty backticks at position {start + 1} in terms `{text}`"
                raise SpecError(msg)
            tokens.append(_Token("name", match.group("quoted"), start - 1, match.end()))
        elif match.group("name") is not None:
            tokens.append(_Token("name", match.group("name"), start, match.end()))
        elif match.group("number") is not None:
            tokens.append(_Token("number", match.group("number"), start, match.end()))
        else:
            tokens.append(_Token("punct", match.group("punct"), start, match.end()))
        pos = match.end()
    tokens.append(_Token("end", "", len(text), len(text)))
    return tokens


def _numeric_term(column: str) -> Term:
    return Term(label=quote_name(column), kind="numeric", column=column)


def _indicator_term(column: str, level: str) -> Term:
    """Build an indicator term as typed; `build_spec` reads the level in the column's type."""
    return Term(indicator_name(column, level), "indicator", column, level=level)


def _transform_term(name: str, column: str, arg: int | None) -> Term:
    """Build a transform term with its canonical label (``pow(x, 2)`` becomes ``square(x)``)."""
    quoted = quote_name(column)
    if name == _CAT:
        return Term(label=quoted, kind="categorical", column=column)
    if name == "pow" and arg == 2:
        name = "square"
        arg = None
    label = f"{name}({quoted})" if arg is None else f"{name}({quoted}, {arg})"
    transform = cast("Transform", name)  # the parser only passes known transform names
    return Term(label=label, kind="transform", column=column, transform=transform, arg=arg)


class _Parser:
    """Recursive-descent parser over the tokens of one terms text."""

    def __init__(self, text: str) -> None:
        self.text = text
        self.tokens = _tokenize(text)
        self.index = 0

    @property
    def token(self) -> _Token:
        return self.tokens[self.index]

    def advance(self) -> _Token:
        token = self.tokens[self.index]
        self.index += 1
        return token

    def at_end(self) -> bool:
        """Whether every token has been read."""
        return self.token.kind == "end"

    def at(self, punct: str) -> bool:
        return self.token.kind == "punct" and self.token.text == punct

    def snippet(self, start: int) -> str:
        return self.text[start : self.tokens[self.index - 1].end].strip()

    def written_term(self, start: int) -> str:
        """Text of the term starting at `start`, up to the next separator outside brackets."""
        depth = 0
        quoted = False
        for pos in range(start, len(self.text)):
            char = self.text[pos]
            if char == "`":
                quoted = not quoted
            elif quoted:
                continue
            elif char == "(":
                depth += 1
            elif char == ")":
                depth -= 1
            elif char in ",+~" and depth <= 0:
                return self.text[start:pos].strip()
        return self.text[start:].strip()

    def fail_here(self, expected: str, start: int) -> NoReturn:
        """Raise a `SpecError` saying what was expected at the current token."""
        token = self.token
        got = "the end of the text" if token.kind == "end" else f"`{token.text}`"
        context = self.text[start : token.end].strip() or self.text
        msg = f"expected {expected} in term `{context}`, got {got}"
        raise SpecError(msg)

    def target(self) -> str:
        """Read the target left of `~`: a column name, or `log`, `log1p` or `sqrt` of one."""
        kinds = "".join(
            t.text if t.kind == "punct" else "n" for t in self.tokens[self.index : self.index + 5]
        )
        if kinds.startswith("n~"):
            target = self.advance().text
        elif kinds == "n(n)~" and self.token.text in TARGET_TRANSFORMS:
            function = self.advance().text
            self.advance()
            target = f"{function}({quote_name(self.advance().text)})"
            self.advance()
        else:
            lhs = self.text[: self.text.index("~")].strip()
            msg = (
                "the target left of `~` must be one column name or `log`, `log1p` or `sqrt` "
                f"of one, got `{lhs}`"
            )
            raise SpecError(msg)
        self.advance()  # "~"
        return target

    def parse(self) -> tuple[str | None, list[tuple[Term, int, str]]]:
        """Parse the whole text into (target, [(term, start offset, written source)])."""
        target: str | None = None
        has_tilde = any(t.kind == "punct" and t.text == "~" for t in self.tokens)
        if has_tilde:
            target = self.target()
        separator = "+" if has_tilde else ","
        items: list[tuple[Term, int, str]] = []
        if self.at_end():
            return target, items
        while True:
            items.extend(self.item(separator))
            if self.at_end():
                return target, items
            if self.at(separator):
                self.advance()
                if self.at_end():
                    msg = f"empty term after the last `{separator}` in terms `{self.text}`"
                    raise SpecError(msg)
                continue
            if self.at("~"):
                msg = f"more than one `~` in terms `{self.text}`"
                raise SpecError(msg)
            other = "+" if separator == "," else ","
            if self.at(other):
                hint = (
                    "separate terms with `,`, or write `target ~ a + b`"
                    if separator == ","
                    else "after `~` separate terms with `+`"
                )
                msg = f"unexpected `{other}` in terms `{self.text}`; {hint}"
                raise SpecError(msg)
            self.fail_here(f"`{separator}` between terms", items[-1][1])

    def item(self, separator: str) -> list[tuple[Term, int, str]]:
        """Parse ``product`` or ``product * product`` (which means ``a, b, a:b``)."""
        start = self.token.start
        if self.token.kind == "end" or self.at(separator):
            msg = f"empty term at position {start + 1} in terms `{self.text}`"
            raise SpecError(msg)
        left = self.product(start)
        if not self.at("*"):
            return [(left, start, self.snippet(start))]
        self.advance()
        right_start = self.token.start
        right = self.product(right_start)
        written = self.snippet(start)
        if self.at("*"):
            msg = f"`*` joins two terms, got more in `{written} * ...`; write the interactions out"
            raise SpecError(msg)
        for part in (left, right):
            if part.kind == "interaction":
                msg = (
                    f"`*` joins two single terms, not the interaction `{part.label}` in `{written}`"
                )
                raise SpecError(msg)
        return [
            (left, start, written),
            (right, right_start, written),
            (_interaction(left, right, written), start, written),
        ]

    def product(self, start: int) -> Term:
        """Parse ``factor`` or ``factor:factor``."""
        left = self.factor(start)
        if not self.at(":"):
            return left
        self.advance()
        right = self.factor(start)
        if self.at(":"):
            msg = f"an interaction joins two terms, got more in `{self.snippet(start)}:...`"
            raise SpecError(msg)
        return _interaction(left, right, self.snippet(start))

    def factor(self, start: int) -> Term:
        """Parse ``name``, ``name ^ k`` or ``function(name[, k])``."""
        token = self.token
        if token.kind == "number":
            msg = (
                f"`{token.text}` in terms `{self.text}` is not a term; the intercept is a "
                "separate option of the model, on by default"
            )
            raise SpecError(msg)
        if token.kind != "name":
            self.fail_here("a column name or a transform such as `log(x)`", start)
        self.advance()
        if self.token.kind == "level":
            indicator = _indicator_term(token.text, self.advance().text)
            if self.at("^"):
                msg = (
                    f"`^` applies to a numeric column, not to the indicator "
                    f"`{indicator.label}`; its powers are itself"
                )
                raise SpecError(msg)
            return indicator
        quoted = self.text[token.start] == "`"
        if self.at("(") and not quoted:
            return self.call(token, start)
        if self.at("^"):
            self.advance()
            power = self.integer(start)
            self.check_power(power, start)
            return _transform_term("pow", token.text, power)
        return _numeric_term(token.text)

    def call(self, function: _Token, start: int) -> Term:
        name = function.text
        if name not in ONE_ARG_TRANSFORMS | POWER_TRANSFORMS | {_CAT}:
            msg = (
                f"unknown transform `{name}` in term `{self.written_term(start)}`; "
                f"known: {_KNOWN_FUNCTIONS}"
            )
            raise SpecError(msg)
        self.advance()  # "("
        inner = self.token
        if inner.kind != "name":
            self.fail_here(f"a column name inside `{name}(...)`", start)
        self.advance()
        if self.at("("):
            msg = f"nested transforms are not supported: `{self.written_term(start)}`"
            raise SpecError(msg)
        arg: int | None = None
        if name in POWER_TRANSFORMS:
            if not self.at(","):
                self.fail_here(f"`,` and an integer after the column in `{name}(x, k)`", start)
            self.advance()
            arg = self.integer(start)
        if not self.at(")"):
            self.fail_here("`)`", start)
        self.advance()
        if arg is not None:
            self.check_power(arg, start)
        if self.at("^"):
            msg = f"`^` applies to a column, not to `{self.snippet(start)}`; use `pow(x, k)`"
            raise SpecError(msg)
        return _transform_term(name, inner.text, arg)

    def integer(self, start: int) -> int:
        token = self.token
        if token.kind != "number" or not token.text.isdigit():
            self.fail_here("an integer power or degree", start)
        self.advance()
        return int(token.text)

    def check_power(self, value: int, start: int) -> None:
        """Require a power or degree of at least 2, quoting the whole term read so far."""
        if value < 2:
            msg = (
                f"the power or degree in `{self.snippet(start)}` must be an integer >= 2, "
                f"got {value}; for the column itself write its name"
            )
            raise SpecError(msg)


def _interaction(left: Term, right: Term, written: str) -> Term:
    for part in (left, right):
        if part.transform == "poly":
            msg = (
                f"`{part.label}` makes several columns and cannot be part of the interaction "
                f"`{written}`; interact a single power such as `square(x)` instead"
            )
            raise SpecError(msg)
        if part.kind == "categorical":
            msg = (
                f"categorical `{part.label}` in the interaction `{written}`; interactions take "
                "two numeric terms"
            )
            raise SpecError(msg)
    if left.label == right.label:
        msg = f"interaction of `{left.label}` with itself in `{written}`; use `square(...)`"
        raise SpecError(msg)
    return Term(label=f"{left.label}:{right.label}", kind="interaction", factors=(left, right))


def _term_key(term: Term) -> frozenset[str] | str:
    """Identity of a term for duplicate checks: `a:b` and `b:a` are the same term."""
    if term.kind == "interaction":
        return frozenset(f.label for f in term.factors)
    return term.label


def _check_duplicates(items: Sequence[tuple[Term, str]]) -> None:
    seen: dict[frozenset[str] | str, str] = {}
    for term, written in items:
        key = _term_key(term)
        if key in seen:
            earlier = seen[key]
            also = "" if earlier == written else f" (as `{earlier}` and as `{written}`)"
            msg = f"term `{term.label}` appears twice{also}; list each term once"
            raise SpecError(msg)
        seen[key] = written


def parse_terms(text: str) -> tuple[str | None, tuple[Term, ...]]:
    """Read model terms from text.

    Parameters
    ----------
    text : str
        Either a comma list, ``distance_km, log(weight_kg), depot, stops:weight_kg``, or
        ``minutes ~ distance_km + log(weight_kg) + depot + stops:weight_kg``. ``a*b``
        means ``a, b, a:b``. Transforms: ``log``, ``log1p``, ``sqrt``, ``square`` (also
        ``x^2``), ``pow(x, k)`` (also ``x^k``), ``poly(x, k)``, ``std``, and ``cat(x)``
        to force a categorical. ``depot=north`` (or the older ``depot[north]``) is one
        indicator, 1 where `depot` is `north`. Backticks quote odd names, and levels with
        a space or one of ``,+~*:()^[]``: ```delivery minutes```, ``depot=`north east```.

    Returns
    -------
    target : str or None
        The column left of ``~``, or None for a comma list.
    terms : tuple of Term
        The terms in written order. Bare names have kind ``numeric`` until `build_spec`
        sees the schema.

    Raises
    ------
    SpecError
        If the text does not parse, or a term appears twice.

    Examples
    --------
    >>> target, terms = parse_terms("y ~ a*log(b)")
    >>> target, [t.label for t in terms]
    ('y', ['a', 'log(b)', 'a:log(b)'])
    """
    target, items = _Parser(text).parse()
    _check_duplicates([(term, written) for term, _, written in items])
    return target, tuple(term for term, _, _ in items)


# ---------------------------------------------------------------------------------------------
# validation against a schema


def is_categorical_dtype(dtype: pl.DataType | type[pl.DataType]) -> bool:
    """Whether a column of this type is coded as categorical by default.

    Parameters
    ----------
    dtype : polars data type
        A column type from a schema.

    Returns
    -------
    bool
        True for String, Categorical, Enum and Boolean.
    """
    return any(dtype == kind for kind in (pl.String, pl.Categorical, pl.Enum, pl.Boolean))


def _is_numeric(dtype: pl.DataType | type[pl.DataType]) -> bool:
    return bool(dtype.is_numeric())


def _check_column(name: str, schema: SchemaLike, where: str) -> None:
    if name not in schema:
        msg = f"unknown column `{name}` in {where}{closest_names_hint(name, schema)}"
        raise SpecError(msg)


@dataclass(frozen=True)
class TextColumnFacts:
    """What a read of a text column found: whether its values are numbers written as text.

    Attributes
    ----------
    column : str
        The column.
    n_rows : int
        Rows read.
    n_values : int
        Rows with a value (not missing).
    n_not_numbers : int
        Values that do not read as numbers.
    first_row : int or None
        0-based position of the first value that is not a number.
    first_text : str or None
        That value.
    """

    column: str
    n_rows: int
    n_values: int
    n_not_numbers: int
    first_row: int | None = None
    first_text: str | None = None

    def problem(self, role: Literal["target", "term", "weights"]) -> str | None:
        """Say why the column cannot serve as a number, or None when it is plainly text.

        A column with no rows, with no value, or whose values are mostly numbers (at
        least half) but not all gets a one-line message with what to do. Text that is all
        numbers (codes such as ``01234`` stored as text) stays a category.
        """
        name = quote_name(self.column)
        if self.n_rows == 0:
            return (
                f"the data has no rows (only a header line?), so the {role} `{self.column}` "
                "has no values; check the file, or its `--separator` and `--no-header`"
            )
        if self.n_values == 0:
            return (
                f"every value of the {role} `{self.column}` is missing ({self.n_rows:,} rows); "
                "choose another column or check the file (`--null-value` sets the texts "
                "read as missing)"
            )
        if self.n_not_numbers == 0 or 2 * self.n_not_numbers > self.n_values:
            return None  # codes stored as text (`01234`), or plain text: a category
        cat_hint = f", or use `cat({name})` to treat it as a category" if role == "term" else ""
        return (
            f"column `{self.column}` is text because {self.n_not_numbers:,} of "
            f"{self.n_values:,} values {'is' if self.n_not_numbers == 1 else 'are'} not a "
            f"number (first at row {self.first_row:,}: `{self.first_text}`); mark it missing "
            f"with `--null-value {self.first_text}`{cat_hint}"
        )


TextColumnCheck: TypeAlias = "Callable[[str], TextColumnFacts]"
"""Reads a text column and reports whether its values are numbers (the data layer's)."""


def _check_text(
    column: str,
    schema: SchemaLike,
    check: TextColumnCheck | None,
    role: Literal["target", "term", "weights"],
) -> None:
    """Raise `SpecError` when a text column holds numbers, no value, or no rows at all."""
    if check is None or schema[column] != pl.String:
        return
    problem = check(column).problem(role)
    if problem is not None:
        raise SpecError(problem)


def _resolve(
    term: Term,
    schema: SchemaLike,
    categorical: frozenset[str],
    target: str,
    check: TextColumnCheck | None = None,
) -> Term:
    """Check one term's columns and types, and settle whether a bare name is categorical."""
    for name in term.columns:
        _check_column(name, schema, f"term `{term.label}`")
        if name == target:
            msg = (
                f"the target `{target}` is also used in the term `{term.label}`; "
                "a model cannot predict a column from itself"
            )
            raise SpecError(msg)
    if term.kind == "interaction":
        factors = tuple(_resolve(f, schema, categorical, target, check) for f in term.factors)
        for factor in factors:
            if factor.kind == "categorical":
                msg = (
                    f"`{factor.column}` is categorical, so the interaction `{term.label}` "
                    "cannot use it; interactions take two numeric terms"
                )
                raise SpecError(msg)
        label = ":".join(f.label for f in factors)  # an indicator's level may read anew
        return replace(term, label=label, factors=factors)
    column = term.column
    assert column is not None  # every non-interaction term has a column
    dtype = schema[column]
    if term.kind == "indicator":
        assert term.level is not None  # the parser sets an indicator's level
        _, level = indicator_value(column, dtype, term.level)
        return replace(term, label=indicator_name(column, level), level=level)
    forced = column in categorical
    if term.kind == "categorical" or (
        term.kind == "numeric" and (forced or is_categorical_dtype(dtype))
    ):
        if term.kind == "numeric" and not forced:
            _check_text(column, schema, check, "term")
        return replace(term, kind="categorical", label=quote_name(column))
    if forced:
        msg = (
            f"`{column}` is listed as categorical, so the term `{term.label}` cannot "
            "transform it; remove it from the categorical columns or use the bare name"
        )
        raise SpecError(msg)
    if not _is_numeric(dtype):
        msg = (
            f"the term `{term.label}` needs a numeric column, but `{column}` has type "
            f"{dtype}; use `cat({quote_name(column)})` to code it as categorical"
        )
        raise SpecError(msg)
    return term


def indicator_value(
    column: str, dtype: pl.DataType | type[pl.DataType], level: str
) -> tuple[object, str]:
    """Read an indicator's level in its column's type.

    Text, Categorical and Enum columns take the level as text; a boolean `true` or
    `false`; an integer column a whole number (``month=3``); a float or decimal column
    a number; a date or datetime column an ISO date (``day=2024-03-01``).

    Parameters
    ----------
    column : str
        The column.
    dtype : polars data type
        Its type in the source.
    level : str
        The level as typed.

    Returns
    -------
    value : object
        The level as a value of the column's type, to compare the column with.
    text : str
        The level as the column's values read as text (``3`` for ``03``, ``true`` for
        ``TRUE``): the name the indicator goes by.

    Raises
    ------
    SpecError
        If the level cannot be read in the column's type, an Enum column has no such
        category, or the column's type cannot hold levels (a list, a duration).

    Examples
    --------
    >>> indicator_value("month", pl.Int64, "03")
    (3, '3')
    """
    shown = indicator_name(column, level)
    if dtype == pl.Enum:
        categories = cast("pl.Enum", dtype).categories.to_list()
        if level not in categories:
            msg = (
                f"`{column}` has no level `{level}` (in `{shown}`); its levels are "
                + ", ".join(f"`{c}`" for c in categories[:10])
                + (f" and {len(categories) - 10} more" if len(categories) > 10 else "")
            )
            raise SpecError(msg)
        return level, level
    if is_categorical_dtype(dtype) and dtype != pl.Boolean:
        return level, level
    if dtype == pl.Boolean:
        if level.lower() not in {"true", "false"}:
            msg = (
                f"`{column}` is true or false, not `{level}` (in `{shown}`); write "
                f"`{indicator_name(column, 'true')}` or `{indicator_name(column, 'false')}`"
            )
            raise SpecError(msg)
        return level.lower() == "true", level.lower()
    read: Callable[[str], object]
    if dtype.is_integer():
        kind, read = "a whole number", _whole_number
    elif dtype.is_float() or dtype.is_decimal():
        kind, read = "a number", _finite_number
    elif dtype == pl.Date:
        kind, read = "a date such as 2024-03-01", datetime.date.fromisoformat
    elif dtype == pl.Datetime:
        kind, read = "a date and time such as 2024-03-01T08:30", datetime.datetime.fromisoformat
    else:
        msg = (
            f"`{column}` has type {dtype}, which holds no levels for `{shown}`; an "
            "indicator takes a text, categorical, boolean, number or date column"
        )
        raise SpecError(msg)
    try:
        value = read(level)
    except ValueError:
        msg = (
            f"the level in `{shown}` must be {kind}, as `{column}` has type {dtype}; "
            "write it as the column's values read"
        )
        raise SpecError(msg) from None
    try:
        text = pl.Series([value]).cast(dtype).cast(pl.String).item()
    except (OverflowError, pl.exceptions.PolarsError):
        msg = (
            f"the level in `{shown}` is outside the range of `{column}`, of type {dtype}; "
            "no row can hold it"
        )
        raise SpecError(msg) from None
    return value, str(text)


def _whole_number(text: str) -> int:
    """Read a whole number written as ``3``, ``03``, ``3.0`` or ``1e3``."""
    number = float(text)
    if not number.is_integer():
        raise ValueError(text)
    return int(text) if text.strip().lstrip("+-").isdigit() else int(number)


def _finite_number(text: str) -> float:
    number = float(text)
    if not math.isfinite(number):
        raise ValueError(text)
    return number


def _check_numeric_column(name: str, schema: SchemaLike, role: str) -> None:
    _check_column(name, schema, role)
    if not _is_numeric(schema[name]):
        msg = f"the {role} `{name}` has type {schema[name]}; it must be numeric"
        raise SpecError(msg)


def target_text(written: str) -> str:
    """Write a target as a formula shows it: ``cost``, `` `unit cost` `` or ``log(cost)``."""
    match = _TARGET_CALL.match(written.strip())
    if match is None:
        return quote_name(written)
    function, column = match.groups()
    return f"{function}({quote_name(column.strip('`'))})"


def split_target(text: str, schema: SchemaLike) -> tuple[str, Transform | None]:
    """Read a target as written: a column name, or ``log``, ``log1p`` or ``sqrt`` of one.

    A column whose name looks like a call (``log(x)`` in the data) is taken as that column.
    """
    match = _TARGET_CALL.match(text.strip())
    if text in schema or match is None:
        return text, None
    function, column = match.groups()
    return column.strip("`"), cast("Transform", function)


def build_spec(
    schema: SchemaLike,
    *,
    target: str | None,
    terms: str | Sequence[Term],
    intercept: bool = True,
    weights: str | None = None,
    where: str | None = None,
    categorical: Sequence[str] = (),
    reference: Mapping[str, str] | None = None,
    max_levels: int = 50,
    max_memory: int | None = None,
    drop_invalid: bool = False,
    check_text: TextColumnCheck | None = None,
) -> ModelSpec:
    """Check a model description against the columns of a source and build its spec.

    Parameters
    ----------
    schema : mapping of str to polars data type
        The source's columns.
    target : str or None
        The column to predict; None when `terms` is formula text with ``target ~ ...``.
    terms : str or sequence of Term
        Term text for `parse_terms`, or terms already parsed.
    intercept : bool, default=True
        Whether the model has an intercept.
    weights : str or None, default=None
        A numeric column of positive weights.
    where : str or None, default=None
        Filter text, checked by `parse_filter`.
    categorical : sequence of str, default=()
        Columns to treat as categorical whatever their type.
    reference : mapping of str to str or None, default=None
        Reference level per categorical column.
    max_levels : int, default=50
        Most levels a categorical may have in the rows it is learned from.
    max_memory : int or None, default=None
        Most bytes a pass's design may take; None for the engine's default.
    drop_invalid : bool, default=False
        Leave out rows outside a transform's domain or with weight <= 0 instead of failing.
    check_text : callable, optional
        Reads a text column (the data layer's `text_column_facts`), so that a target,
        weights or bare term that is text because of a stray value, or has no value or
        no rows, is refused with what to do (``cat(x)`` still makes a category).

    Returns
    -------
    ModelSpec
        The validated spec; bare names of String, Categorical, Enum or Boolean columns, or
        listed in `categorical`, become categorical terms; an indicator's level is read in
        its column's type (`indicator_value`).

    Raises
    ------
    SpecError
        For unknown columns (with up to three closest names), a missing or non-numeric
        target, a target used as a term, non-numeric weights or weights that are the
        target, a categorical inside an interaction or transform, an indicator whose level
        its column's type cannot hold or whose column is also a categorical term,
        duplicate terms, no terms and no intercept, a reference for a column that is not
        a categorical term, or an invalid filter.
    """
    if isinstance(terms, str):
        written_target, parsed = parse_terms(terms)
        if written_target is not None and target is not None and written_target != target:
            msg = (
                f"the terms name the target `{written_target}` but the target given is "
                f"`{target}`; give it in one place"
            )
            raise SpecError(msg)
        target = target if target is not None else written_target
    else:
        parsed = tuple(terms)
    if target is None:
        msg = "no target column; give one, or write the terms as `target ~ a + b`"
        raise SpecError(msg)
    target, target_transform = split_target(target, schema)
    if target not in schema:
        msg = f"unknown target column `{target}`{closest_names_hint(target, schema)}"
        raise SpecError(msg)
    _check_text(target, schema, check_text, "target")
    if not _is_numeric(schema[target]):
        msg = f"the target `{target}` has type {schema[target]}; the target must be numeric"
        raise SpecError(msg)
    if max_levels < 2:
        msg = f"`max_levels` must be an integer >= 2, got {max_levels}"
        raise SpecError(msg)
    for column in categorical:
        _check_column(column, schema, "the categorical columns")
    forced = frozenset(categorical)
    resolved = tuple(_resolve(t, schema, forced, target, check_text) for t in parsed)
    _check_duplicates([(t, t.label) for t in resolved])
    if not resolved and not intercept:
        msg = "the model has no terms and no intercept; add a term or keep the intercept"
        raise SpecError(msg)
    if weights is not None:
        _check_column(weights, schema, "weights column")
        _check_text(weights, schema, check_text, "weights")
        _check_numeric_column(weights, schema, "weights column")
        if weights == target:
            msg = (
                f"the weights column `{weights}` is also the target; weights say how much "
                "each row counts, so choose another column or fit without weights"
            )
            raise SpecError(msg)
    categorical_terms = {t.column for t in resolved if t.kind == "categorical"}
    for term in resolved:
        if term.kind == "indicator" and term.column in categorical_terms:
            msg = (
                f"`{term.label}` is one of the indicators the categorical term "
                f"`{quote_name(term.column or '')}` makes already; keep one of the two (the "
                f"categorical's left-out level is chosen with `--reference {term.label}`)"
            )
            raise SpecError(msg)
    reference = dict(reference or {})
    for column in reference:
        if column not in categorical_terms:
            msg = (
                f"a reference level is given for `{column}`, which is not a categorical term "
                "of the model; give references only for categorical terms"
            )
            raise SpecError(msg)
    if where is not None:
        parse_filter(where, schema)
    return ModelSpec(
        target=target,
        terms=resolved,
        intercept=intercept,
        weights=weights,
        where=where,
        categorical=tuple(dict.fromkeys(categorical)),
        reference=MappingProxyType(reference),
        max_levels=max_levels,
        max_memory=max_memory,
        drop_invalid=drop_invalid,
        target_transform=target_transform,
    )
