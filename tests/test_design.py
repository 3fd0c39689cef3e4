"""Tests for triage.core.design: design matrices built from polars frames."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.formula.api as smf

from triage.core.design import INTERCEPT, ROW_INDEX, DesignBuilder
from triage.core.spec import ModelSpec, build_spec, indicator_name, split_indicator_name
from triage.errors import DataError, SpecError


def with_rows(frame: pl.DataFrame) -> pl.DataFrame:
    return frame.with_row_index(ROW_INDEX)


def make(
    frame: pl.DataFrame, terms: str, *, sample: pl.DataFrame | None = None, **kwargs: object
) -> tuple[ModelSpec, DesignBuilder]:
    spec = build_spec(frame.schema, terms=terms, **kwargs)  # type: ignore[arg-type]
    learned_on = frame if sample is None else sample
    return spec, DesignBuilder.learn(spec, frame.schema, learned_on)


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261201)


SMALL = with_rows(
    pl.DataFrame(
        {
            "y": [1.0, 2.5, 2.0, 4.5, 6.0],
            "a": [1.0, 2.0, 3.0, 4.0, 5.0],
            "b": [0.5, 1.5, 0.0, 3.0, 8.0],
            "k": [1, 4, 2, 3, 7],
        }
    )
)


def test_design_numeric_and_transforms_equal_hand_built_numpy() -> None:
    _, builder = make(
        SMALL,
        "y ~ a + log(a) + log1p(b) + sqrt(b) + square(k) + pow(a, 3) + a:k + std(b)",
        target=None,
    )
    batch = builder.build(SMALL)
    a = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    b = np.array([0.5, 1.5, 0.0, 3.0, 8.0])
    k = np.array([1.0, 4.0, 2.0, 3.0, 7.0])
    # oracle: the same columns written out with numpy (std uses ddof=1, as numpy's std(ddof=1))
    expected = np.column_stack(
        [
            np.ones(5),
            a,
            np.log(a),
            np.log1p(b),
            np.sqrt(b),
            k**2,
            a**3,
            a * k,
            (b - b.mean()) / b.std(ddof=1),
        ]
    )
    np.testing.assert_allclose(batch.x, expected, rtol=1e-15, atol=1e-15)
    np.testing.assert_array_equal(batch.y, [1.0, 2.5, 2.0, 4.5, 6.0])
    assert batch.weights is None
    np.testing.assert_array_equal(batch.rows, np.arange(5))
    assert batch.rows.dtype == np.int64
    assert builder.column_names == (
        INTERCEPT,
        "a",
        "log(a)",
        "log1p(b)",
        "sqrt(b)",
        "square(k)",
        "pow(a, 3)",
        "a:k",
        "std(b)",
    )
    assert builder.term_of_column == builder.column_names
    assert builder.numeric_predictors == ("a", "b", "k")
    assert builder.scaling["std(b)"] == pytest.approx((b.mean(), b.std(ddof=1)), rel=1e-15)


def test_design_poly_columns_and_no_intercept() -> None:
    _, builder = make(SMALL, "poly(a, 3), b", target="y", intercept=False)
    batch = builder.build(SMALL)
    a = SMALL["a"].to_numpy()
    # oracle: numpy.vander gives raw powers; columns a, a^2, a^3
    expected = np.column_stack([np.vander(a, 4, increasing=True)[:, 1:], SMALL["b"].to_numpy()])
    np.testing.assert_array_equal(batch.x, expected)
    assert builder.column_names == ("a", "a^2", "a^3", "b")
    assert builder.term_of_column == ("poly(a, 3)", "poly(a, 3)", "poly(a, 3)", "b")


def test_design_arrays_are_contiguous_float64() -> None:
    _, builder = make(SMALL, "a, b, k", target="y", weights="b")
    batch = builder.build(SMALL.filter(pl.col("b") > 0))
    assert batch.x.dtype == np.float64
    assert batch.x.flags.f_contiguous or batch.x.flags.c_contiguous
    assert batch.y.flags.c_contiguous
    assert batch.weights is not None
    np.testing.assert_array_equal(batch.weights, [0.5, 1.5, 3.0, 8.0])
    np.testing.assert_array_equal(batch.rows, [0, 1, 3, 4])


@pytest.mark.parametrize("intercept", [True, False])
def test_design_columns_equal_the_built_matrix(intercept: bool) -> None:
    # The matrix `build` makes (checked against numpy above) is the oracle here.
    _, builder = make(SMALL, "a, square(k), a:b, poly(b, 2)", target="y", intercept=intercept)
    columns = builder.build_columns(SMALL)
    batch = builder.build(SMALL)
    assert columns is not None and columns.n_rows == 5
    first = 1 if intercept else 0
    np.testing.assert_array_equal(np.column_stack(columns.predictors), batch.x[:, first:])
    np.testing.assert_array_equal(columns.y, batch.y)
    # A float64 column is read where polars holds it, not copied.
    assert np.shares_memory(columns.predictors[0], SMALL["a"].to_numpy())


def test_design_columns_leave_rows_to_drop_and_weights_to_build() -> None:
    with_null = SMALL.with_columns(pl.Series("b", [0.5, None, 0.0, 3.0, 8.0]))
    _, plain = make(SMALL, "a, b", target="y")
    assert plain.build_columns(with_null) is None
    for terms, kwargs in [
        ("a, log(a)", {}),
        ("a, k", {"categorical": ["k"]}),
        ("a", {"weights": "b"}),
    ]:
        _, builder = make(SMALL, terms, target="y", **kwargs)
        assert builder.build_columns(SMALL) is None, terms


def test_design_intercept_only_and_empty_batch() -> None:
    _, builder = make(SMALL, "", target="y")
    batch = builder.build(SMALL)
    np.testing.assert_array_equal(batch.x, np.ones((5, 1)))
    empty = builder.build(SMALL.head(0))
    assert empty.x.shape == (0, 1)
    assert empty.y.shape == (0,)
    assert empty.n_dropped_missing == 0


LEVELS = with_rows(
    pl.DataFrame(
        {
            "y": [3.0, 1.0, 4.0, 1.5, 5.0, 9.0, 2.0, 6.0, 5.5],
            "depot": ["north", "south", "east", "north", "south", "north", "east", "west", "east"],
            "rush": [True, False, False, True, True, False, False, True, False],
            "grade": [1, 2, 2, 3, 1, 2, 3, 3, 2],
        }
    )
)


@pytest.mark.parametrize(
    ("column", "dtype"),
    [
        ("depot", pl.String),
        ("depot", pl.Categorical),
        ("depot", pl.Enum(["east", "north", "south", "west"])),
        ("rush", pl.Boolean),
    ],
)
def test_design_dummies_equal_pandas_get_dummies(column: str, dtype: pl.DataType) -> None:
    frame = LEVELS.with_columns(pl.col(column).cast(dtype))
    _, builder = make(frame, column, target="y")
    batch = builder.build(frame)
    reference = builder.reference_levels[column]
    # oracle: pandas.get_dummies on the same values, reference column dropped
    values = LEVELS[column].cast(pl.String).to_list()
    dummies = pd.get_dummies(pd.Series(values), dtype=float).drop(columns=[reference])
    np.testing.assert_array_equal(batch.x[:, 1:], dummies.to_numpy())
    assert builder.column_names[1:] == tuple(f"{column}={c}" for c in dummies.columns)
    assert set(builder.term_of_column[1:]) == {column}


def test_design_reference_is_most_frequent_ties_sorted_or_chosen() -> None:
    # north and east both appear 3 times: the tie goes to `east`, first in sorted order
    _, builder = make(LEVELS, "depot, grade", target="y", categorical=("grade",))
    assert builder.reference_levels == {"depot": "east", "grade": "2"}
    assert builder.levels["depot"] == ("east", "north", "south", "west")
    assert builder.column_names == (
        INTERCEPT,
        "depot=north",
        "depot=south",
        "depot=west",
        "grade=1",
        "grade=3",
    )
    _, chosen = make(LEVELS, "depot", target="y", reference={"depot": "west"})
    assert chosen.reference_levels == {"depot": "west"}
    assert chosen.column_names[1:] == ("depot=east", "depot=north", "depot=south")


@pytest.mark.parametrize(
    ("typed", "expected"),
    [
        ("depot=north", ("depot", "north")),
        ("depot[north]", ("depot", "north")),  # the older bracket form is still read
        (" `pick up` = cargo bike ", ("pick up", "cargo bike")),
        ("`pick up`[cargo bike]", ("pick up", "cargo bike")),
        ("depot", None),
        ("=north", None),
    ],
)
def test_indicator_names_read_back_in_either_form(
    typed: str, expected: tuple[str, str] | None
) -> None:
    assert split_indicator_name(typed) == expected


def test_indicator_name_round_trips_and_quotes_odd_columns() -> None:
    assert indicator_name("vehicle", "cargo_bike") == "vehicle=cargo_bike"
    assert indicator_name("pick up", "van") == "`pick up`=van"
    assert split_indicator_name(indicator_name("pick up", "van")) == ("pick up", "van")


def test_design_matches_statsmodels_wls_with_categorical_interaction_and_weights(rng) -> None:
    n = 60
    depot = rng.choice(["north", "south", "east"], size=n)
    distance = rng.uniform(1, 30, size=n)
    stops = rng.integers(1, 9, size=n).astype(float)
    weight = rng.uniform(0.5, 20, size=n)
    w = rng.uniform(0.2, 3, size=n)
    shift = {"north": 0.0, "south": 4.0, "east": -2.0}
    minutes = (
        5
        + 1.7 * distance
        + np.array([shift[d] for d in depot])
        + 0.3 * stops * np.log(weight)
        + rng.normal(0, 2, size=n)
    )
    data = {
        "minutes": minutes,
        "distance_km": distance,
        "depot": depot,
        "stops": stops,
        "weight_kg": weight,
        "w": w,
    }
    frame = with_rows(pl.DataFrame(data))
    _, builder = make(
        frame,
        "minutes ~ distance_km + depot + stops:log(weight_kg)",
        target=None,
        weights="w",
        reference={"depot": "north"},
    )
    batch = builder.build(frame)
    assert batch.weights is not None
    root_w = np.sqrt(batch.weights)
    coef = np.linalg.lstsq(batch.x * root_w[:, None], batch.y * root_w, rcond=None)[0]
    # oracle: statsmodels formula WLS with treatment coding against the same reference
    model = smf.wls(
        "minutes ~ distance_km + C(depot, Treatment('north')) + stops:np.log(weight_kg)",
        data=pd.DataFrame(data),
        weights=w,
    ).fit()
    expected = model.params.to_numpy()
    # statsmodels orders: intercept, depot dummies (sorted), distance_km, interaction
    ours = dict(zip(builder.column_names, coef, strict=True))
    reordered = [
        ours[INTERCEPT],
        ours["depot=east"],
        ours["depot=south"],
        ours["distance_km"],
        ours["stops:log(weight_kg)"],
    ]
    np.testing.assert_allclose(reordered, expected, rtol=1e-8)

    # oracle: statsmodels OLS for the unweighted model on the same design
    _, unweighted = make(
        frame,
        "minutes ~ distance_km + depot + stops:log(weight_kg)",
        target=None,
        reference={"depot": "north"},
    )
    plain = unweighted.build(frame)
    ols_coef = np.linalg.lstsq(plain.x, plain.y, rcond=None)[0]
    ols = smf.ols(
        "minutes ~ distance_km + C(depot, Treatment('north')) + stops:np.log(weight_kg)",
        data=pd.DataFrame(data),
    ).fit()
    np.testing.assert_allclose(ols_coef[[0, 2, 3, 1, 4]], ols.params.to_numpy(), rtol=1e-8)


def test_design_drops_and_counts_missing_values() -> None:
    frame = with_rows(
        pl.DataFrame(
            {
                "y": [1.0, 2.0, None, 4.0, 5.0, 6.0, 7.0, 8.0],
                "x": [1.0, float("nan"), 3.0, float("inf"), -float("inf"), 6.0, 7.0, 8.0],
                "k": [1, 2, 3, 4, 5, None, 7, 8],
                "g": ["a", "b", "a", "b", "a", "b", None, "b"],
            }
        )
    )
    _, builder = make(frame, "x, k, g", target="y")
    assert builder.levels["g"] == ("a", "b")  # learned from the usable rows 0 and 7
    batch = builder.build(frame)
    # rows 1 (NaN), 2 (null y), 3 (+inf), 4 (-inf), 5 (null k), 6 (null level) are missing
    assert batch.n_dropped_missing == 6
    assert batch.n_dropped_unseen_level == 0
    assert batch.n_dropped_domain == 0
    np.testing.assert_array_equal(batch.rows, [0, 7])
    assert batch.frame[ROW_INDEX].to_list() == [0, 7]
    assert batch.frame.columns == frame.columns


def test_design_levels_are_the_rows_with_a_value_in_the_column_and_unseen_levels_dropped() -> None:
    sample = with_rows(pl.DataFrame({"y": [1.0, 2.0, 3.0, None], "g": ["a", "b", "a", "c"]}))
    _, builder = make(sample, "g", target="y")
    # the documented rule: levels and their counts come from every row with a value in the
    # column, whatever the other columns hold (so a full pass can count them cheaply)
    assert builder.levels["g"] == ("a", "b", "c")
    assert builder.level_tables["g"].counts == (2, 1, 1)
    assert builder.reference_levels["g"] == "a"
    batch_frame = with_rows(pl.DataFrame({"y": [1.0, 2.0, 3.0, 4.0], "g": ["c", "b", "d", "a"]}))
    batch = builder.build(batch_frame)
    assert batch.n_dropped_unseen_level == 1
    np.testing.assert_array_equal(batch.rows, [0, 1, 3])
    np.testing.assert_array_equal(batch.x, [[1.0, 0.0, 1.0], [1.0, 1.0, 0.0], [1.0, 0.0, 0.0]])


@pytest.mark.parametrize("dtype", [pl.String, pl.Categorical])
def test_coded_batch_codes_are_pandas_codes_against_the_learned_levels(
    dtype: pl.DataType, rng: np.random.Generator
) -> None:
    """A coded batch's level codes are each row's position among the learned levels.

    pandas finds values among fixed labels the same way (`Index.get_indexer`: -1 for a
    missing value or one not among them); text read dictionary-encoded (Categorical) must
    agree with text.
    Rows missing a value or holding an unseen level are left out and counted.
    """
    offices = np.array([f"O{k:02d}" for k in range(30)], dtype=object)
    shares = 1.0 / np.arange(1, 31)  # skewed, as office codes are
    values = rng.choice(offices, size=4_000, p=shares / shares.sum())
    values[rng.random(values.size) < 0.04] = None
    x = rng.normal(size=values.size)
    x[rng.random(values.size) < 0.02] = np.nan
    frame = with_rows(pl.DataFrame({"y": x + 1.0, "x": x, "office": list(values)}))
    sample = frame.filter(pl.col("office").is_in(list(offices[:24])))  # six levels unseen
    _, builder = make(frame, "x, office", target="y", sample=sample, max_levels=40)
    batch = builder.build_coded(frame.with_columns(pl.col("office").cast(dtype)))
    assert batch is not None
    expected = pd.Index(list(builder.levels["office"])).get_indexer(values)
    has_x = ~np.isnan(x)
    kept = has_x & (expected >= 0)
    np.testing.assert_array_equal(batch.design.factors[0].codes, expected[kept])
    np.testing.assert_array_equal(batch.rows, np.flatnonzero(kept))
    assert batch.n_dropped_missing == int(np.count_nonzero(~has_x | pd.isna(values)))
    assert batch.n_dropped_unseen_level == int(
        np.count_nonzero(has_x & ~pd.isna(values) & (expected < 0))
    )


@pytest.mark.parametrize(
    ("term", "values", "pattern"),
    [
        ("log(x)", [1.0, 0.0, -2.0, 3.0], r"log of a value <= 0 in `log\(x\)` for 2 rows"),
        ("sqrt(x)", [1.0, -0.5, 2.0, 3.0], r"sqrt of a negative value in `sqrt\(x\)` for 1 row"),
        ("log1p(x)", [-1.0, -3.0, 2.0, 3.0], r"log1p of a value <= -1 in `log1p\(x\)` for 2 rows"),
        ("x:log(z)", [1.0, 2.0, 3.0, 4.0], r"log of a value <= 0 in `log\(z\)` for 1 row"),
    ],
)
def test_design_domain_errors_and_drop_invalid(
    term: str, values: list[float], pattern: str
) -> None:
    frame = with_rows(
        pl.DataFrame({"y": [1.0, 2.0, 3.0, 4.0], "x": values, "z": [1.0, 2.0, 0.0, 3.0]})
    )
    good = frame.filter(pl.col("x") > 0, pl.col("z") > 0)
    _, strict = make(frame, term, target="y", sample=good)
    with pytest.raises(DataError, match=pattern + " in this batch; filter them with `--where`"):
        strict.build(frame)
    with pytest.raises(DataError, match="pass `--drop-invalid` to leave those rows out"):
        strict.build(frame)
    _, lenient = make(frame, term, target="y", sample=good, drop_invalid=True)
    batch = lenient.build(frame)
    n_bad = int(pattern.split(" for ")[1].split(" ")[0])  # the count written in the message
    assert batch.n_dropped_domain == n_bad
    assert batch.n_rows == 4 - n_bad
    assert np.isfinite(batch.x).all()


def test_design_missing_counts_before_domain() -> None:
    frame = with_rows(pl.DataFrame({"y": [None, 2.0, 3.0], "x": [-1.0, -1.0, 2.0]}))
    _, builder = make(frame, "log(x), sqrt(x)", target="y", drop_invalid=True)
    batch = builder.build(frame)
    # row 0 is missing (counted once), row 1 fails two domain checks (counted once)
    assert (batch.n_dropped_missing, batch.n_dropped_domain) == (1, 1)
    np.testing.assert_array_equal(batch.rows, [2])


def test_design_nonpositive_weights() -> None:
    frame = with_rows(
        pl.DataFrame(
            {"y": [1.0, 2.0, 3.0, 4.0], "x": [1.0, 2.0, 4.0, 3.0], "w": [1.0, 0.0, -2.0, 2.0]}
        )
    )
    _, strict = make(frame, "x", target="y", weights="w")
    with pytest.raises(
        DataError,
        match=r"weight <= 0 in the weights column `w` for 2 rows in this batch; weights must be "
        r"positive: filter them with `--where` \(for example `w > 0`\)",
    ):
        strict.build(frame)
    _, lenient = make(frame, "x", target="y", weights="w", drop_invalid=True)
    batch = lenient.build(frame)
    assert batch.n_dropped_domain == 2
    assert batch.weights is not None
    np.testing.assert_array_equal(batch.weights, [1.0, 2.0])


def test_design_overflow_is_a_domain_problem() -> None:
    frame = with_rows(pl.DataFrame({"y": [1.0, 2.0, 3.0], "x": [1.0, 1e200, 2.0]}))
    _, strict = make(frame, "square(x)", target="y")
    with pytest.raises(DataError, match=r"too large for float64 in `square\(x\)` for 1 row"):
        strict.build(frame)
    _, lenient = make(frame, "square(x)", target="y", drop_invalid=True)
    batch = lenient.build(frame)
    assert batch.n_dropped_domain == 1
    np.testing.assert_array_equal(batch.rows, [0, 2])
    np.testing.assert_array_equal(batch.x[:, 1], [1.0, 4.0])
    assert batch.frame.height == 2


def test_design_max_levels() -> None:
    frame = with_rows(
        pl.DataFrame({"y": np.arange(12, dtype=float), "g": [f"l{i % 6}" for i in range(12)]})
    )
    with pytest.raises(
        SpecError,
        match=r"categorical column `g` has 6 levels in the sample, more than the limit of 5; "
        r"raise the limit with `--max-levels` or filter the rows with `--where`",
    ):
        make(frame, "g", target="y", max_levels=5)
    _, builder = make(frame, "g", target="y", max_levels=6)
    assert len(builder.column_names) == 6


def test_design_learn_errors() -> None:
    frame = with_rows(
        pl.DataFrame(
            {
                "y": [1.0, 2.0, 3.0],
                "g": ["a", "a", "a"],
                "h": ["p", "q", "p"],
                "c": [2.0, 2.0, 2.0],
                "x": [1.0, 2.0, 3.0],
            }
        )
    )
    with pytest.raises(DataError, match=r"categorical term `g` has only the level `a`"):
        make(frame, "g", target="y")
    with pytest.raises(SpecError, match=r"reference level `r` for `h` is not among its levels"):
        make(frame, "h", target="y", reference={"h": "r"})
    with pytest.raises(DataError, match=r"`std\(c\)` cannot be standardised"):
        make(frame, "std(c)", target="y")
    with pytest.raises(SpecError, match=r"two design columns are both named `x`"):
        make(frame, "x, poly(x, 2)", target="y")


def test_design_clean_batch_with_huge_sums_takes_the_row_path_and_drops_nothing() -> None:
    # the quick whole-batch check sums each float column; 1e308 + 1e308 overflows to inf
    # (IEEE 754 double range), which must only send the batch to the per-row check
    frame = with_rows(pl.DataFrame({"y": [1e308, 1e308, 1.0], "x": [1.0, 2.0, 3.0]}))
    _, builder = make(frame, "x", target="y")
    batch = builder.build(frame)
    assert (batch.n_dropped_missing, batch.n_dropped_domain, batch.n_dropped_unseen_level) == (
        0,
        0,
        0,
    )
    np.testing.assert_array_equal(batch.y, [1e308, 1e308, 1.0])
