"""Tests for triage.core.spec: term parsing and validation against a schema."""

from __future__ import annotations

import polars as pl
import pytest

from triage.core.spec import ModelSpec, Term, build_spec, parse_terms, quote_name
from triage.errors import SpecError

SCHEMA = {
    "minutes": pl.Float64,
    "distance_km": pl.Float64,
    "weight_kg": pl.Float64,
    "stops": pl.Int64,
    "depot": pl.String,
    "van": pl.Categorical,
    "is_rush": pl.Boolean,
    "grade": pl.Int32,
    "w": pl.Float64,
    "delivery minutes": pl.Float64,
    "note": pl.String,
}


def labels(terms: tuple[Term, ...]) -> list[str]:
    return [t.label for t in terms]


def test_spec_parse_comma_list() -> None:
    target, terms = parse_terms("distance_km, log(weight_kg), depot, stops:weight_kg")
    assert target is None
    assert labels(terms) == ["distance_km", "log(weight_kg)", "depot", "stops:weight_kg"]
    assert [t.kind for t in terms] == ["numeric", "transform", "numeric", "interaction"]
    assert terms[1].transform == "log"
    assert terms[1].column == "weight_kg"
    assert terms[3].column is None
    assert labels(terms[3].factors) == ["stops", "weight_kg"]


def test_spec_parse_formula_gives_target_and_same_terms() -> None:
    target, terms = parse_terms("minutes ~ distance_km + log(weight_kg) + depot + stops:weight_kg")
    _, comma_terms = parse_terms("distance_km, log(weight_kg), depot, stops:weight_kg")
    assert target == "minutes"
    assert terms == comma_terms


@pytest.mark.parametrize("text", ["y ~ a*b", "a*b"])
def test_spec_star_expands_to_main_effects_and_interaction(text: str) -> None:
    # Wilkinson & Rogers (1973) notation: a*b means a + b + a:b
    _, terms = parse_terms(text)
    assert labels(terms) == ["a", "b", "a:b"]


def test_spec_transforms_and_canonical_labels() -> None:
    _, terms = parse_terms(
        "log1p(a), sqrt(b), square(c), d^2, e^3, pow(f, 2), pow(g, 4), poly(h, 3), std(i), cat(j)"
    )
    assert labels(terms) == [
        "log1p(a)",
        "sqrt(b)",
        "square(c)",
        "square(d)",
        "pow(e, 3)",
        "square(f)",
        "pow(g, 4)",
        "poly(h, 3)",
        "std(i)",
        "j",
    ]
    assert terms[4].transform == "pow"
    assert terms[4].arg == 3
    assert terms[7].arg == 3
    assert terms[9].kind == "categorical"


def test_spec_labels_parse_back_to_the_same_terms() -> None:
    text = "`delivery minutes`, log(`a b`), poly(`c d`, 2), `e f`:g, std(h)"
    _, terms = parse_terms(text)
    _, again = parse_terms(", ".join(labels(terms)))
    assert again == terms


def test_spec_backticks_quote_odd_names() -> None:
    target, terms = parse_terms("`delivery minutes` ~ log(`weight (kg)`) + `van-id`")
    assert target == "delivery minutes"
    assert [t.column for t in terms] == ["weight (kg)", "van-id"]
    assert labels(terms) == ["log(`weight (kg)`)", "`van-id`"]
    assert quote_name("plain_name.2") == "plain_name.2"
    assert quote_name("has space") == "`has space`"


def test_spec_empty_terms_parse() -> None:
    assert parse_terms("") == (None, ())
    assert parse_terms("y ~ ") == ("y", ())


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("a, a", r"term `a` appears twice"),
        ("a:b, b:a", r"term `b:a` appears twice \(as `a:b` and as `b:a`\)"),
        ("a, a*b", r"term `a` appears twice \(as `a` and as `a\*b`\)"),
        ("x^2, square(x)", r"term `square\(x\)` appears twice"),
        ("g, cat(g)", r"term `g` appears twice"),
        ("a + b", r"separate terms with `,`, or write `target ~ a \+ b`"),
        ("y ~ a, b", r"after `~` separate terms with `\+`"),
        ("y ~ a ~ b", r"more than one `~`"),
        ("lg(x), b", r"unknown transform `lg` in term `lg\(x\)`; known: log"),
        ("a, log(sqrt(x)), b", r"nested transforms are not supported: `log\(sqrt\(x\)\)`$"),
        ("a, ", r"empty term after the last `,`"),
        ("a,,b", r"empty term at position 3"),
        ("x^1", r"`x\^1` must be an integer >= 2, got 1"),
        ("poly(x, 1)", r"`poly\(x, 1\)` must be an integer >= 2"),
        ("pow(x)", r"expected `,` and an integer .* in term `pow\(x\)`, got `\)`"),
        ("a, log(x", r"expected `\)` in term `log\(x`, got the end of the text"),
        (
            "square(y) ~ x",
            r"target left of `~` must be one column name or `log`, `log1p` or `sqrt` of one, "
            r"got `square\(y\)`",
        ),
        ("a:b:c", r"an interaction joins two terms"),
        ("a*b*c", r"`\*` joins two terms"),
        ("a:b*c", r"not the interaction `a:b`"),
        ("cat(g):x", r"categorical `g` in the interaction `cat\(g\):x`"),
        ("poly(x, 2):z", r"`poly\(x, 2\)` makes several columns"),
        ("x:x", r"interaction of `x` with itself"),
        ("`ab", r"unclosed backtick"),
        ("a, ``", r"empty backticks"),
        ("y ~ a - 1", r"`-` at position 7 .* intercept is a separate option"),
        ("y ~ 1", r"`1` in terms `y ~ 1` is not a term"),
        ("a b", r"expected `,` between terms in term `a b`, got `b`"),
        ("a, x^2.5", r"expected an integer power or degree in term `x\^2.5`"),
        ("a; b", r"unexpected `;` at position 2"),
    ],
)
def test_spec_parse_errors_point_at_the_term(text: str, pattern: str) -> None:
    with pytest.raises(SpecError, match=pattern):
        parse_terms(text)


def test_spec_parser_never_evaluates_python(tmp_path) -> None:
    marker = tmp_path / "ran"
    with pytest.raises(SpecError):
        parse_terms(f"__import__('os').system('touch {marker}')")
    assert not marker.exists()


def test_build_spec_resolves_categorical_kinds() -> None:
    spec = build_spec(
        SCHEMA,
        target="minutes",
        terms="distance_km, depot, van, is_rush, grade, cat(stops)",
        categorical=("grade",),
    )
    kinds = {t.label: t.kind for t in spec.terms}
    assert kinds == {
        "distance_km": "numeric",
        "depot": "categorical",
        "van": "categorical",
        "is_rush": "categorical",
        "grade": "categorical",
        "stops": "categorical",
    }
    assert spec.categorical == ("grade",)


def test_build_spec_formula_target_and_source_columns() -> None:
    spec = build_spec(
        SCHEMA,
        target=None,
        terms="minutes ~ log(weight_kg) + stops:distance_km + depot",
        weights="w",
        where="note <> 'skip' AND stops > 0",
    )
    assert isinstance(spec, ModelSpec)
    assert spec.target == "minutes"
    assert spec.model_columns() == ("minutes", "weight_kg", "stops", "distance_km", "depot", "w")
    assert spec.source_columns() == (
        "minutes",
        "weight_kg",
        "stops",
        "distance_km",
        "depot",
        "w",
        "note",
    )


def test_build_spec_accepts_parsed_terms_and_backticked_columns() -> None:
    _, terms = parse_terms("`delivery minutes`, sqrt(weight_kg)")
    spec = build_spec(SCHEMA, target="minutes", terms=terms)
    assert spec.terms == terms
    assert spec.reference == {}


def test_build_spec_intercept_only_model() -> None:
    spec = build_spec(SCHEMA, target="minutes", terms="")
    assert spec.terms == ()
    assert spec.intercept


def test_build_spec_spec_is_hashable_and_frozen() -> None:
    spec = build_spec(SCHEMA, target="minutes", terms="depot", reference={"depot": "north"})
    assert hash(spec) == hash(build_spec(SCHEMA, target="minutes", terms="depot"))
    with pytest.raises(AttributeError):
        spec.target = "x"  # type: ignore[misc]
    with pytest.raises(TypeError):
        spec.reference["depot"] = "south"  # type: ignore[index]


@pytest.mark.parametrize(
    ("kwargs", "pattern"),
    [
        (
            {"target": "minutes", "terms": "log(dpeot)"},
            r"unknown column `dpeot` in term `log\(dpeot\)`; closest: `depot`",
        ),
        (
            {"target": "minutes", "terms": "stops:wieght_kg"},
            r"unknown column `wieght_kg` in term `stops:wieght_kg`; closest: `weight_kg`",
        ),
        ({"target": "minuts", "terms": "stops"}, r"unknown target column `minuts`; closest: "),
        ({"target": None, "terms": "stops"}, r"no target column"),
        (
            {"target": "depot", "terms": "stops"},
            r"the target `depot` has type String; the target must be numeric",
        ),
        (
            {"target": "minutes", "terms": "stops, log(minutes)"},
            r"the target `minutes` is also used in the term `log\(minutes\)`",
        ),
        (
            {"target": "stops", "terms": "y ~ a"},
            r"the terms name the target `y` but the target given is `stops`",
        ),
        (
            {"target": "minutes", "terms": "stops", "weights": "depot"},
            r"the weights column `depot` has type String; it must be numeric",
        ),
        (
            {"target": "minutes", "terms": "stops", "weights": "wt"},
            r"unknown column `wt` in weights column; closest: `w`",
        ),
        (
            {"target": "minutes", "terms": "", "intercept": False},
            r"no terms and no intercept",
        ),
        (
            {"target": "minutes", "terms": "depot:stops"},
            r"`depot` is categorical, so the interaction `depot:stops` cannot use it",
        ),
        (
            {"target": "minutes", "terms": "log(depot)"},
            r"the term `log\(depot\)` needs a numeric column, but `depot` has type String; "
            r"use `cat\(depot\)`",
        ),
        (
            {"target": "minutes", "terms": "sqrt(grade)", "categorical": ("grade",)},
            r"`grade` is listed as categorical, so the term `sqrt\(grade\)` cannot transform",
        ),
        (
            {"target": "minutes", "terms": "stops", "categorical": ("grdae",)},
            r"unknown column `grdae` in the categorical columns; closest: `grade`",
        ),
        (
            {"target": "minutes", "terms": "depot, cat(depot)"},
            r"term `depot` appears twice",
        ),
        (
            {"target": "minutes", "terms": "stops", "reference": {"depot": "north"}},
            r"reference level is given for `depot`, which is not a categorical term",
        ),
        (
            {"target": "minutes", "terms": "stops", "where": "stosp > 1"},
            r"unknown column `stosp` in filter `stosp > 1`; closest: `stops`",
        ),
        (
            {"target": "minutes", "terms": "stops", "max_levels": 1},
            r"`max_levels` must be an integer >= 2, got 1",
        ),
    ],
)
def test_build_spec_errors(kwargs: dict[str, object], pattern: str) -> None:
    with pytest.raises(SpecError, match=pattern):
        build_spec(SCHEMA, **kwargs)  # type: ignore[arg-type]
