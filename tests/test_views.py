"""Tests of the views layer: number formatting, text sections, charts and JSON.

Results are built by the real accumulators and engine on small data made here; the
checks compare against numpy, statsmodels and Python's own float parsing.
"""

from __future__ import annotations

import itertools
import json
import math
import re
import unicodedata
from pathlib import Path
from typing import Any, get_args

import numpy as np
import polars as pl
import pytest
from hypothesis import example, given
from hypothesis import strategies as st

from tests.json_contract import COEFFICIENT_KEYS, FIT_SECTIONS
from triage._typing import ALL_ROWS
from triage.core.spec import build_spec
from triage.data.source import open_source
from triage.engine.passes import fit_model, run_report
from triage.results.diagnostics import Flag, FlagCode
from triage.results.fit import FitOutcome, ReportOutcome
from triage.views.charts import histogram_view, render_binned, render_histogram
from triage.views.flags import flag_message
from triage.views.format import (
    NA,
    amount_decimals,
    cell_width,
    fit_cell,
    format_count,
    format_fixed,
    format_number,
    format_p,
    truncate,
)
from triage.views.json import fit_to_json, json_safe, report_to_json
from triage.views.text import (
    model_formula,
    render_aliased,
    render_coefficients,
    render_data_summary,
    render_fit_quality,
    render_fit_report,
    render_full_report,
    render_tests,
    table,
)

ANSI = re.compile(r"\x1b\[")


# ── format ──────────────────────────────────────────────────────────────────────────


@given(
    st.floats(allow_nan=False, allow_infinity=False, min_value=-1e300, max_value=1e300).filter(
        lambda v: v != 0.0 and abs(v) > 1e-300
    ),
    st.integers(min_value=1, max_value=8),
)
@example(9.5, 1)  # rounds up past one digit: "10", found by hypothesis
def test_format_number_keeps_significant_digits(value: float, digits: int) -> None:
    # Oracle: Python's float() parses the text back; rounding to `digits` significant
    # digits leaves a relative error of at most half a unit in the last digit.
    text = format_number(value, digits=digits)
    back = float(text)
    assert abs(back - value) <= 0.5 * 10 ** (1 - digits) * abs(value) * (1 + 1e-12)
    mantissa = text.lstrip("-").split("e")[0].replace(".", "").lstrip("0")
    # a value that rounds up to 10**digits or more is written in whole digits (9.5 at one
    # digit is "10"): the rounded value, not the value, decides
    assert len(mantissa) == digits or abs(back) >= 10**digits


def test_format_number_examples() -> None:
    # Expected strings written out by hand for the format's stated rules.
    assert format_number(0.03125, digits=3) == "0.0312"  # round-half-even of 3.125e-2
    assert format_number(12345.678) == "12350"
    assert format_number(9.99996) == "10.00"
    assert format_number(1.5e7) == "1.500e7"
    assert format_number(-3.1e-9, digits=2) == "-3.1e-9"
    assert format_number(2.5, digits=3, trim=True) == "2.5"
    assert format_number(0.0) == "0"
    assert format_number(float("inf")) == "inf"
    assert format_number(np.float32(0.5)) == "0.5000"


@pytest.mark.parametrize("missing", [None, float("nan"), np.nan, np.float64("nan")])
def test_format_missing_is_not_available_mark(missing: object) -> None:
    assert format_number(missing) == NA
    assert format_p(missing) == NA
    assert format_count(missing) == NA


def test_format_p_values() -> None:
    assert format_p(0.0312) == "0.0312"
    assert format_p(0.0) == "<1e-300"
    assert format_p(1e-310) == "<1e-300"
    assert format_p(3.14159e-9) == "3.1e-9"
    assert format_p(1.0) == "1.00"
    # Oracle: scipy's normal tail gives a p-value that underflows to exactly 0.
    from scipy import stats

    assert format_p(2 * stats.norm.sf(40.0)) == "<1e-300"


def test_format_count_separators() -> None:
    assert format_count(1204) == "1,204"
    assert format_count(np.int64(60_000_000)) == "60,000,000"
    assert format_count(0) == "0"


@given(st.text(min_size=0, max_size=40), st.integers(min_value=0, max_value=50))
def test_truncate_fits_and_marks_cuts(text: str, width: int) -> None:
    out = truncate(text, width)
    assert cell_width(out) <= width
    if cell_width(text) <= width:
        assert out == text
    elif width == 0:
        assert out == ""
    else:
        assert out.endswith("…")
        assert text.startswith(out[:-1])


def east_asian_cells(text: str) -> int:
    """Terminal cells by Unicode's East Asian Width property (UAX #11, Python's unicodedata):
    wide (W) and full-width (F) characters take two cells, the rest one (no control or
    combining characters in these tests)."""
    return sum(2 if unicodedata.east_asian_width(char) in "WF" else 1 for char in text)


def cell_slice(line: str, start: int, end: int) -> str:
    """The characters of `line` lying wholly in terminal cells [start, end) (East Asian Width)."""
    kept, at = [], 0
    for char in line:
        size = east_asian_cells(char)
        if at >= start and at + size <= end:
            kept.append(char)
        at += size
    return "".join(kept)


def test_table_aligns_japanese_names_and_emoji_by_terminal_cells() -> None:
    # Oracle: Unicode East Asian Width (unicodedata), independent of rich's width table.
    headers = ["列名", "estimate", "note"]
    rows = [["配達時間", "1.5", "🚚 late"], ["distance_km", "-2.25", "ok"], ["北倉庫", "10", "-"]]
    lines = table(headers, rows, align=["<", ">", "<"], width=80).splitlines()
    spans = [(m.start(), m.end()) for m in re.finditer("╌+", lines[1])]  # one cell per ╌
    assert len(spans) == len(headers) and len(lines) == 2 + len(rows)
    for line, cells in zip([lines[0], *lines[2:]], [headers, *rows], strict=True):
        for (start, end), cell in zip(spans, cells, strict=True):
            assert cell_slice(line, start, end).strip() == cell
        for (_, end), (start, _) in itertools.pairwise(spans):
            assert cell_slice(line, end, start) == " " * (start - end)  # the gap stays blank
    right = [cell_slice(line, *spans[1]) for line in lines[2:]]
    assert [cell[-1] for cell in right] == ["5", "5", "0"]  # right-aligned by cells


def test_table_cuts_a_wide_name_at_a_cell_boundary() -> None:
    # A free-text column narrowed to fit: a double-width character never straddles the cut,
    # and every line keeps the width of the rule (oracle: Unicode East Asian Width).
    rows = [["a", "配達時間の記録は長い"], ["b", "🚚" * 8], ["c", "plain text is long too"]]
    lines = table(["k", "note"], rows, align=["<", "<"], width=14, shrink=1).splitlines()
    rule_cells = east_asian_cells(lines[1])
    assert rule_cells <= 14
    for line in lines[2:]:
        assert line.endswith("…")
        assert rule_cells - 1 <= east_asian_cells(line) <= rule_cells


def test_chart_note_centres_a_japanese_title_by_cells() -> None:
    from triage.views.charts import _note

    # Oracle: Unicode East Asian Width (unicodedata); the note sits in the middle line.
    for width in range(18, 24):
        lines = _note("配達時間: no rows", width, 3).splitlines()
        assert [east_asian_cells(line) for line in lines] == [width] * 3
        left = len(lines[1]) - len(lines[1].lstrip(" "))
        right = len(lines[1]) - len(lines[1].rstrip(" "))
        assert lines[1].strip() == "配達時間: no rows" and abs(left - right) <= 1


def test_padding_and_cutting_count_cells() -> None:
    # Oracle: Unicode East Asian Width (unicodedata).
    for text in ["配達時間", "🚚 mobile", "distance_km", "北倉庫 depot"]:
        for width in range(1, 14):
            for align in ("<", ">"):
                cell = fit_cell(text, width, align)
                assert east_asian_cells(cell) == width
                assert cell.strip(" ") == truncate(text, width)
        assert cell_width(text) == east_asian_cells(text)


# ── results built by the real engine on small invented data ────────────────────────


def _write(tmp_path_factory: pytest.TempPathFactory, name: str, frame: pl.DataFrame) -> Path:
    path = tmp_path_factory.mktemp("views") / f"{name}.parquet"
    frame.write_parquet(path, row_group_size=100)
    return path


@pytest.fixture(scope="module")
def trips(tmp_path_factory: pytest.TempPathFactory) -> pl.DataFrame:
    """Invented data: a skewed error, a categorical shift, a collinear column, a few nulls."""
    rng = np.random.default_rng(7)
    n = 600
    x = rng.uniform(0.0, 10.0, n)
    z = rng.normal(size=n)
    g = rng.choice(["north", "south", "west"], n)
    y = 1.0 + 2.0 * x - 0.5 * z + (g == "south") * 1.5 + rng.exponential(1.0, n)
    x_missing = x.copy()
    x_missing[:4] = np.nan
    return pl.DataFrame(
        {"y": y, "x": x_missing, "z": z, "g": g, "twice_x": 2.0 * x_missing}
    ).with_columns(pl.col("x").fill_nan(None), pl.col("twice_x").fill_nan(None))


@pytest.fixture(scope="module")
def trips_path(tmp_path_factory: pytest.TempPathFactory, trips: pl.DataFrame) -> Path:
    return _write(tmp_path_factory, "trips", trips)


@pytest.fixture(scope="module")
def report(trips_path: Path) -> ReportOutcome:
    source = open_source(trips_path)
    spec = build_spec(source.schema(), target="y", terms="x, z, g, twice_x")
    return run_report(source, spec, rows=ALL_ROWS, top_k=5, by=("g",))


@pytest.fixture(scope="module")
def sampled_fit(trips_path: Path) -> FitOutcome:
    source = open_source(trips_path)
    spec = build_spec(source.schema(), target="y", terms="x, z", intercept=False)
    return fit_model(source, spec, rows=200, seed=3)


def _statsmodels_fit(trips: pl.DataFrame, names: list[str]) -> Any:
    """Oracle: statsmodels OLS on the same complete rows, with the design columns `names`
    (``intercept``, numeric columns, and ``g=level`` dummies) built here with numpy."""
    import statsmodels.api as sm

    frame = trips.drop_nulls(["x"])
    columns = []
    for name in names:
        if name == "intercept":
            columns.append(np.ones(frame.height))
        elif name.startswith("g="):
            columns.append((frame["g"] == name[2:]).to_numpy().astype(float))
        else:
            columns.append(frame[name].to_numpy())
    return sm.OLS(frame["y"].to_numpy(), np.column_stack(columns)).fit()


def _estimable(report: ReportOutcome) -> list[str]:
    return [n for n in report.outcome.fit.names if n not in report.outcome.fit.aliased]


# ── JSON ─────────────────────────────────────────────────────────────────────────────


def test_views_fit_json_round_trips_with_contract_keys(report: ReportOutcome) -> None:
    outcome = report.outcome
    doc = json.loads(json.dumps(fit_to_json(outcome), allow_nan=False))
    for section, keys in FIT_SECTIONS.items():
        assert keys <= set(doc[section]), section
    assert set(doc["coefficients"][0]) == COEFFICIENT_KEYS
    assert doc["coefficients"][0]["term"] == "intercept"
    assert doc["model"]["terms"] == ["x", "z", "g", "twice_x"]
    assert doc["data"]["rows_dropped"] == 4
    assert doc["data"]["sample"] is None
    fit = outcome.fit
    assert doc["fit"]["r2"] == fit.r2
    assert doc["fit"]["df_resid"] == fit.df_resid
    for i, entry in enumerate(doc["coefficients"]):
        assert entry["term"] == fit.names[i]
        for key, values in (("estimate", fit.coef), ("std_error", fit.std_error), ("p", fit.p)):
            expected = None if math.isnan(values[i]) else float(values[i])
            assert entry[key] == expected


def test_views_fit_json_aliased_column_is_null(report: ReportOutcome) -> None:
    doc = fit_to_json(report.outcome)
    assert doc["aliased"] == ["twice_x"]
    aliased = next(c for c in doc["coefficients"] if c["term"] == "twice_x")
    assert aliased["estimate"] is None
    assert aliased["ci_low"] is None


def test_views_fit_json_estimates_match_statsmodels(
    report: ReportOutcome, trips: pl.DataFrame
) -> None:
    # Oracle: statsmodels OLS on the estimable design columns.
    names = _estimable(report)
    oracle = _statsmodels_fit(trips, names)
    doc = fit_to_json(report.outcome)
    by_name = {c["term"]: c for c in doc["coefficients"]}
    estimates = np.array([by_name[n]["estimate"] for n in names])
    errors = np.array([by_name[n]["std_error"] for n in names])
    np.testing.assert_allclose(estimates, oracle.params, rtol=1e-9)
    np.testing.assert_allclose(errors, oracle.bse, rtol=1e-9)
    assert doc["fit"]["r2"] == pytest.approx(oracle.rsquared, rel=1e-10)
    assert doc["fit"]["aic"] == pytest.approx(oracle.aic, rel=1e-10)


def test_views_report_json_round_trips_with_contract_keys(report: ReportOutcome) -> None:
    doc = json.loads(json.dumps(report_to_json(report), allow_nan=False))
    d = report.diagnostics
    assert set(doc["robust_se"]) == {"HC0", "HC1", "HC2", "HC3"}
    assert doc["robust_se"]["HC3"]["x"] == d.robust_se["x"].hc3
    tests = doc["tests"]
    assert set(tests["breusch_pagan"]) == {"stat", "df", "p"}
    assert set(tests["jarque_bera"]) == {"stat", "df", "p"}
    assert set(tests["reset"]) == {"stat", "df1", "df2", "p"}
    assert set(tests["durbin_watson"]) == {"stat"}
    assert tests["breusch_pagan"]["stat"] == d.tests["breusch_pagan"].statistic
    assert set(doc["worst"]) == {"abs_resid", "studentized", "leverage", "cooks"}
    first = doc["worst"]["cooks"][0]
    assert {"row", "fitted", "resid", "studentized", "leverage", "cooks"} <= set(first)
    assert first["row"] == d.worst["cooks"][0].row
    levels = doc["segments"]["g"]
    assert {lv["level"] for lv in levels} == {"north", "south", "west"}
    assert set(levels[0]) == {"level", "n", "mean_resid", "rmse", "t"}
    hist = doc["histogram"]
    assert hist["counts"] == d.histogram.counts.tolist()
    assert sum(hist["counts"]) + hist["below"] + hist["above"] == d.n
    assert len(hist["edges"]) == len(hist["counts"]) + 1
    assert {"fitted", "x", "z"} <= set(doc["binned"])
    assert {"lo", "hi", "n", "mean_resid", "q10", "q50", "q90"} <= set(doc["binned"]["fitted"][0])
    assert [f["code"] for f in doc["flags"]] == [f.code for f in d.flags]


def test_views_report_json_worst_rows_match_statsmodels(
    report: ReportOutcome, trips: pl.DataFrame
) -> None:
    # Oracle: statsmodels OLSInfluence. The source positions of the complete rows are
    # their positions in `trips` (the first four rows have a null and are dropped).
    oracle = _statsmodels_fit(trips, _estimable(report))
    positions = np.flatnonzero(trips["x"].is_not_null().to_numpy())
    influence = oracle.get_influence()
    cooks = influence.cooks_distance[0]
    doc = report_to_json(report)
    worst = doc["worst"]["cooks"]
    top = np.argsort(-cooks)[: len(worst)]
    assert [w["row"] for w in worst] == positions[top].tolist()
    np.testing.assert_allclose([w["cooks"] for w in worst], cooks[top], rtol=1e-8)
    leverage_top = np.argsort(-influence.hat_matrix_diag)[0]
    assert doc["worst"]["leverage"][0]["row"] == positions[leverage_top]


def test_views_json_safe_converts_numpy_and_non_finite() -> None:
    value = {
        "a": np.float64("nan"),
        "b": np.inf,
        "c": np.int64(3),
        "d": np.array([1.5, np.nan]),
        "e": (np.bool_(True), -np.inf),
        2: np.float32(0.5),
    }
    out = json_safe(value)
    assert out == {"a": None, "b": None, "c": 3, "d": [1.5, None], "e": [True, None], "2": 0.5}
    assert type(out["c"]) is int
    json.dumps(out, allow_nan=False)


# ── charts ───────────────────────────────────────────────────────────────────────────

SIZES = [(76, 14), (120, 30)]


def _check_size(text: str, width: int, height: int) -> None:
    lines = text.split("\n")
    assert len(lines) == height
    assert max(len(line) for line in lines) <= width


@pytest.mark.parametrize(("width", "height"), SIZES)
def test_views_charts_render_plain_at_pane_sizes(
    report: ReportOutcome, width: int, height: int
) -> None:
    d = report.diagnostics
    hist = render_histogram(d.histogram, width, height, color=False)
    assert not ANSI.search(hist)
    _check_size(hist, width, height)
    assert "█" in hist
    for name, bins in d.binned.items():
        chart = render_binned(bins, width, height, title=f"by {name}", x_label=name, color=False)
        assert not ANSI.search(chart)
        _check_size(chart, width, height)
        assert "●" in chart


def test_views_charts_color_keeps_ansi(report: ReportOutcome) -> None:
    chart = render_histogram(report.diagnostics.histogram, 76, 14, color=True)
    assert ANSI.search(chart)


def _plot_columns(lines: list[str]) -> tuple[int, int]:
    """Return the first and last column inside the chart frame (from the `┌`/`┐` corners)."""
    top = next(line for line in lines if "┌" in line)
    return top.index("┌") + 1, top.index("┐") - 1


def _tallest_bar_fraction(text: str) -> float:
    """Where, from 0 (left edge) to 1 (right edge), the highest bar cells sit."""
    lines = text.split("\n")
    left, right = _plot_columns(lines)
    row = next(line for line in lines if "█" in line[left : right + 1])
    columns = [i for i in range(left, right + 1) if row[i] == "█"]
    return (float(np.mean(columns)) - left + 0.5) / (right - left + 1)


def test_views_histogram_tallest_bar_where_numpy_puts_it(
    report: ReportOutcome, trips: pl.DataFrame
) -> None:
    # Oracle: numpy.histogram of the statsmodels residuals on the chart's own edges. The
    # error is exponential (skewed), so the tallest bin lies left of the middle.
    d = report.diagnostics
    edges = d.histogram.edges
    oracle = _statsmodels_fit(trips, _estimable(report))
    counts, _ = np.histogram(oracle.resid, bins=edges)
    np.testing.assert_array_equal(d.histogram.counts, counts)
    tallest = np.flatnonzero(counts == counts.max())
    assert tallest.max() < len(counts) // 2  # the skew is there to be seen
    for width, height in SIZES:
        fraction = _tallest_bar_fraction(render_histogram(d.histogram, width, height, color=False))
        position = edges[0] + fraction * (edges[-1] - edges[0])
        bin_width = edges[1] - edges[0]
        # Within one bin of numpy's tallest bin (one cell of rounding at 76 columns).
        nearest = np.min(np.abs(position - (edges[tallest] + bin_width / 2)))
        assert nearest <= 1.5 * bin_width, (width, fraction, tallest)


def test_views_histogram_differs_with_the_data(report: ReportOutcome) -> None:
    d = report.diagnostics
    hist = d.histogram
    # the mirror image of the same residuals (every residual negated)
    flipped = type(hist)(
        edges=-hist.edges[::-1],
        counts=hist.counts[::-1].copy(),
        below=hist.above,
        above=hist.below,
        minimum=-hist.maximum,
        maximum=-hist.minimum,
        quantiles={1.0 - p: -v for p, v in hist.quantiles.items()},
        fine_edges=-hist.fine_edges[::-1],
        fine_counts=hist.fine_counts[::-1].copy(),
    )
    one = render_histogram(hist, 76, 14, color=False)
    two = render_histogram(flipped, 76, 14, color=False)
    assert one != two
    view, mirror = histogram_view(hist, 34), histogram_view(flipped, 34)
    assert (view.below, view.above) == (mirror.above, mirror.below)
    np.testing.assert_array_equal(view.counts, mirror.counts[::-1])


def test_views_binned_chart_shows_missed_curve(tmp_path: Path) -> None:
    # Fitting a straight line to a parabola leaves positive mean residuals at both ends
    # and negative ones in the middle; numpy.polyfit is the oracle for those signs.
    rng = np.random.default_rng(11)
    x = rng.uniform(-3.0, 3.0, 800)
    y = x**2 + 0.1 * rng.normal(size=800)
    path = tmp_path / "curve.parquet"
    pl.DataFrame({"y": y, "x": x}).write_parquet(path)
    source = open_source(path)
    spec = build_spec(source.schema(), target="y", terms="x")
    bins = run_report(source, spec, rows=ALL_ROWS).diagnostics.binned["x"]
    resid = y - np.polyval(np.polyfit(x, y, 1), x)
    assert resid[x < -2.5].mean() > 0 > resid[np.abs(x) < 0.5].mean()
    text = render_binned(bins, 120, 30, title="by x", x_label="x", color=False)
    lines = text.split("\n")
    zero_row = next(i for i, line in enumerate(lines) if re.match(r"^\s*0[┤├]", line))
    left, right = _plot_columns(lines)
    marks = [
        (i, j)
        for i, line in enumerate(lines)
        for j in range(left, right + 1)
        if j < len(line) and line[j] == "●"
    ]
    leftmost = min(marks, key=lambda m: m[1])
    rightmost = max(marks, key=lambda m: m[1])
    middle = min(marks, key=lambda m: abs(m[1] - (left + right) / 2))
    assert leftmost[0] < zero_row and rightmost[0] < zero_row  # above the zero line
    assert middle[0] > zero_row  # below it


def test_views_charts_are_safe_across_threads(report: ReportOutcome) -> None:
    # plotext has one global figure; the lock must keep concurrent renders apart.
    from concurrent.futures import ThreadPoolExecutor

    d = report.diagnostics
    jobs = [(w, h) for w, h in SIZES for _ in range(4)]

    def draw(size: tuple[int, int]) -> tuple[str, str]:
        w, h = size
        return (
            render_histogram(d.histogram, w, h, color=False),
            render_binned(d.binned["fitted"], w, h, title="t", x_label="fitted", color=False),
        )

    expected = {size: draw(size) for size in SIZES}
    with ThreadPoolExecutor(max_workers=4) as pool:
        results = list(pool.map(draw, jobs))
    assert all(result == expected[size] for result, size in zip(results, jobs, strict=True))


def test_views_charts_too_small_or_empty_give_a_note(report: ReportOutcome) -> None:
    d = report.diagnostics
    small = render_histogram(d.histogram, 10, 4, color=False)
    _check_size(small, 10, 4)
    empty = render_binned((), 76, 14, title="by x", x_label="x", color=False)
    _check_size(empty, 76, 14)
    assert "no rows" in empty


# ── text ─────────────────────────────────────────────────────────────────────────────

BORROWED = [
    "residual standard error",
    "multiple r-squared",
    "dep. variable",
    "signif. codes",
    "pr(>|t|)",
    "ols regression results",
    "***",
]


def test_views_table_aligns_columns() -> None:
    text = table(
        ["name", "value", "p"],
        [["a", "1.5", "0.01"], ["longer name", "-12.25", NA]],
        align=["<", ">", ">"],
    )
    lines = text.split("\n")
    ends = {
        line.rindex(cell) + len(cell)
        for line, cell in zip(lines, ["p", "╌", "0.01", NA], strict=True)
    }
    assert len(ends) == 1  # the right-aligned last column ends in one place
    value_ends = {
        lines[0].index("value") + 5,
        lines[2].index("1.5") + 3,
        lines[3].index("-12.25") + 6,
    }
    assert len(value_ends) == 1


def test_views_table_shrinks_the_named_column() -> None:
    text = table(
        ["term", "estimate"],
        [["a_very_long_term_name_indeed", "1.000"]],
        align=["<", ">"],
        width=20,
    )
    assert max(len(line) for line in text.split("\n")) <= 20
    assert "…" in text


def test_views_coefficients_show_aliased_as_not_available(report: ReportOutcome) -> None:
    text = render_coefficients(report.outcome.fit)
    row = next(line for line in text.split("\n") if line.startswith("twice_x"))
    assert row.count(NA) == 6  # estimate, SE, t, p and both interval ends


@pytest.mark.parametrize("width", [80, 120])
def test_views_full_report_fits_width_and_uses_own_wording(
    report: ReportOutcome, width: int
) -> None:
    text = render_full_report(report, width=width, charts=True, color=False)
    assert not ANSI.search(text)
    assert max(len(line) for line in text.split("\n")) <= width
    lowered = text.lower() + render_fit_report(report.outcome).lower()
    for heading in BORROWED:
        assert heading not in lowered
    assert "every row" in text
    assert "── fit quality" in text
    assert "R² alone does not judge a fit" in text
    assert "twice_x" in render_aliased(report.outcome.fit)
    assert "Breusch–Pagan" in text and "Durbin–Watson" not in text  # rows not ordered
    for flag in report.diagnostics.flags:
        assert f"[{flag.code}]" in text


def test_views_report_without_charts_has_no_chart(report: ReportOutcome) -> None:
    text = render_full_report(report, width=100, charts=False)
    assert "█" not in text and "●" not in text


def test_views_data_summary_says_sample_and_drops(
    report: ReportOutcome, sampled_fit: FitOutcome
) -> None:
    full = render_data_summary(report.outcome.data)
    assert "every row" in full
    assert re.search(r"dropped: missing values\s+4\b", full)
    sampled = render_data_summary(sampled_fit.data, width=60)
    assert max(len(line) for line in sampled.split("\n")) <= 60
    flat = " ".join(sampled.split())  # long values wrap; compare without line breaks
    assert sampled_fit.data.sample is not None and sampled_fit.data.sample_warning is not None
    assert f"a sample: {sampled_fit.data.sample}" in flat
    assert sampled_fit.data.sample_warning in flat
    assert fit_to_json(sampled_fit)["data"]["sample"] == sampled_fit.data.sample


def test_views_no_intercept_says_uncentered(sampled_fit: FitOutcome) -> None:
    assert model_formula(sampled_fit.spec) == "y ~ x + z  (no intercept)"
    quality = render_fit_quality(sampled_fit.fit)
    assert "uncentered" in quality
    assert fit_to_json(sampled_fit)["model"]["intercept"] is False


def test_views_tests_table_shows_missing_p_as_mark(report: ReportOutcome) -> None:
    text = render_tests(report.diagnostics, is_ordered=True)
    dw = next(line for line in text.split("\n") if line.strip().startswith("Durbin–Watson"))
    assert dw.count(NA) == 2  # no df, no p
    bp = report.diagnostics.tests["breusch_pagan"]
    assert format_number(bp.statistic) in text


def test_views_durbin_watson_only_when_rows_are_ordered(report: ReportOutcome) -> None:
    assert "Durbin–Watson" not in render_tests(report.diagnostics)
    assert "Durbin–Watson" in render_tests(report.diagnostics, is_ordered=True)


def test_views_tests_are_grouped_by_question_with_excess_kurtosis(report: ReportOutcome) -> None:
    lines = render_tests(report.diagnostics, is_ordered=True).split("\n")
    questions = [line for line in lines[3:] if not line.startswith(" ")]
    assert questions == [
        "does the spread change with the inputs?",
        "is there curvature the terms miss?",
        "are the tails like a normal's?",
        "are neighbouring rows related? (2: not at all)",
    ]
    excess = next(line for line in lines if "excess kurtosis" in line)
    # excess kurtosis is the moment kurtosis less 3 (0 for a normal distribution)
    assert format_number(report.diagnostics.resid_kurtosis - 3.0, digits=3) in excess


def test_views_fit_quality_groups_and_counts_parameters(report: ReportOutcome) -> None:
    fit = report.outcome.fit
    text = render_fit_quality(fit, target="y", width=80)
    order = [
        "how much of the target the model explains",
        "how big the errors are, in the units of y",
        "whether the terms earn their place",
        "whether the numbers can be trusted",
    ]
    assert [line for line in text.split("\n")[1:] if line in order] == order
    # statsmodels' OLS counts the coefficients (intercept included) in AIC and BIC, and so
    # do we; the help and this line say so.
    assert f"({fit.df_model + 1} coefficients counted)" in text
    assert "condition no., scaled design" in text
    assert " df " not in text.split("whether the terms")[0]
    assert max(len(line) for line in text.split("\n")) <= 80


@pytest.mark.parametrize(
    ("scale", "decimals"), [(94.7, 1), (42.84, 1), (0.0123, 4), (15_000.0, 0), (0.0, 1)]
)
def test_amount_decimals_show_the_residual_sd_to_three_digits(scale: float, decimals: int) -> None:
    assert amount_decimals(scale) == decimals
    assert format_fixed(10_260.0, 1) == "10,260.0"


def test_views_worst_rows_check_by_eye(report: ReportOutcome) -> None:
    """Observed, fitted and residual share one format: observed - fitted = residual, to the
    last printed digit (numbers re-read from the text; no value is rounded twice)."""
    text = render_full_report(report, width=80, charts=False)
    block = text.split("largest residuals (absolute)")[1].split("\n\n")[0]
    rows = [line.split() for line in block.strip().split("\n")[3:]]
    assert rows
    decimals = amount_decimals(report.outcome.fit.resid_sd)
    for cells in rows:
        observed, fitted, resid = (float(c.replace(",", "")) for c in cells[1:4])
        assert abs(observed - fitted - resid) <= 1.0001 * 10.0**-decimals


def _one_flag_of_each_rule() -> list[Flag]:
    return [
        Flag("large-studentized", 1, cutoff=4.2, rows=5_000, beyond_limit=40, expected=13.5),
        Flag("high-leverage", 2, cutoff=0.004),
        Flag("influential-rows", 1, cutoff=0.0008),
        Flag("spread-changes", 1e-5),
        Flag("curvature", 0.003),
        Flag("tails", 1e-9, skewness=0.8, excess_kurtosis=2.5),
        Flag("serial-correlation", 1.1),
        Flag("shared-trend", 0.97),
        Flag("many-terms", 12, rows=80),
    ]


def test_views_every_flag_rule_has_words_that_hedge() -> None:
    flags = _one_flag_of_each_rule()
    assert {f.code for f in flags} == set(get_args(FlagCode))
    for flag in flags:
        assert "may" in flag_message(flag), flag.code
    assert "1 row beyond ±4.2" in flag_message(flags[0])
    assert "2 rows have leverage above 2p/n = 0.004" in flag_message(flags[1])
    assert "1 row has Cook's distance above 4/n" in flag_message(flags[2])


def test_views_flag_words_quote_the_rules_limits(monkeypatch: pytest.MonkeyPatch) -> None:
    # The numbers in the sentences come from triage.core.flag_rules: change a limit there
    # and the words follow.
    flags = {f.code: f for f in _one_flag_of_each_rule()}
    assert "< 0.01" in flag_message(flags["spread-changes"])
    assert "outside 1.5–2.5" in flag_message(flags["serial-correlation"])
    monkeypatch.setattr("triage.views.flags.FLAG_P_VALUE", 0.05)
    monkeypatch.setattr("triage.views.flags.DURBIN_WATSON_RANGE", (1.2, 2.8))
    monkeypatch.setattr("triage.views.flags.STUDENTIZED_LIMIT", 2.5)
    monkeypatch.setattr("triage.views.flags.TREND_R2", 0.9)
    monkeypatch.setattr("triage.views.flags.ROWS_PER_TERM", 20)
    monkeypatch.setattr("triage.views.flags.BONFERRONI_LEVEL", 0.1)
    assert "< 0.05" in flag_message(flags["spread-changes"])
    assert "< 0.05" in flag_message(flags["tails"])
    assert "outside 1.2–2.8" in flag_message(flags["serial-correlation"])
    assert "40 rows beyond ±2.5" in flag_message(flags["large-studentized"])
    assert "in 9 fits of 10" in flag_message(flags["large-studentized"])
    assert "above 0.9," in flag_message(flags["shared-trend"])
    assert "fewer than 20 rows per coefficient" in flag_message(flags["many-terms"])


def test_histogram_view_spans_the_body_on_a_robust_scale() -> None:
    """Oracle: numpy counts of the same residuals beyond the drawn edges."""
    from types import SimpleNamespace

    rng = np.random.default_rng(11)
    resid = np.concatenate([rng.normal(0, 10, 20_000), np.full(40, 5_000.0)])  # 40 gross
    sd = resid.std(ddof=1)
    fine_edges = np.linspace(-8 * sd, 8 * sd, 401)
    cells = np.searchsorted(fine_edges, resid, side="right")  # 0: below, 401: above
    fine = np.bincount(cells, minlength=402)
    q = {p: float(np.quantile(resid, p)) for p in (0.25, 0.5, 0.75)}
    hist = SimpleNamespace(
        edges=np.linspace(-4 * sd, 4 * sd, 41),
        counts=np.histogram(resid, np.linspace(-4 * sd, 4 * sd, 41))[0],
        below=0,
        above=40,
        quantiles=q,
        fine_edges=fine_edges,
        fine_counts=fine,
    )
    view = histogram_view(hist, bars=36)
    assert view.is_robust and view.counts.size <= 36
    assert view.below == int(np.sum(resid < view.edges[0]))
    assert view.above == int(np.sum(resid >= view.edges[-1]))
    assert view.counts.sum() + view.below + view.above == resid.size
    # the body: the window is about ±4 robust SDs (IQR/1.349 is about 10 here), not ±4 SD
    robust_sd = (q[0.75] - q[0.25]) / 1.349
    fine_bin = fine_edges[1] - fine_edges[0]  # edges fall on the fine grid
    assert view.edges[-1] - view.edges[0] == pytest.approx(8 * robust_sd, abs=2 * fine_bin)
    assert view.edges[-1] - view.edges[0] < 0.5 * 8 * sd


@pytest.mark.parametrize("width", [40, 60, 76, 80, 120, 200])
def test_binned_chart_legend_is_never_blank(report: ReportOutcome, width: int) -> None:
    bins = report.diagnostics.binned["fitted"]
    text = render_binned(
        bins, width, 14, title="residual by fitted value", x_label="fitted value", color=False
    )
    legend = [line for line in text.split("\n") if "● mean" in line]
    assert len(legend) == 1 and "10-90%" in legend[0]
    if width >= 76:  # room to say the bins hold about equal numbers of rows
        assert "equal" in legend[0]
