"""Every claim README.md and sample_parquet/README.md make about the demo, measured.

Each test quotes the sentence it checks. Figures "about X" are held to the tolerance the
wording allows; statsmodels OLS on the bundled file is the oracle for the demo README's
statistics, and triage's own report (what the screen shows) for the tour. The README's
usage examples are run as written from the repository root (outputs under a temporary
folder instead of /tmp, and the 20-million-row sample made at 20,000 rows).
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.formula.api as smf

from triage._typing import ALL_ROWS
from triage.cli.main import build_parser, main
from triage.core.spec import build_spec
from triage.data.scenario import planted_positions
from triage.data.source import ROW_INDEX, open_source
from triage.engine.passes import run_report
from triage.errors import SourceError
from triage.results.fit import ReportOutcome

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_parquet" / "deliveries.parquet"
README = (ROOT / "README.md").read_text(encoding="utf-8")
DEMO_README = (ROOT / "sample_parquet" / "README.md").read_text(encoding="utf-8")
TOUR_TERMS = "distance_km, stops, weight_kg, hour, vehicle"
STRAIGHT = "minutes ~ distance_km + stops + weight_kg + C(vehicle)"


def said(sentence: str, text: str = DEMO_README) -> None:
    """Fail unless the README still says `sentence` (whitespace-insensitive)."""
    assert " ".join(sentence.split()) in " ".join(text.split()), sentence


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    table = pl.read_parquet(DEMO).with_row_index("position")
    return table.to_pandas()


@pytest.fixture(scope="module")
def used(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.dropna(subset=["distance_km", "weight_kg"])


@pytest.fixture(scope="module")
def planted(frame: pd.DataFrame) -> Any:
    return planted_positions(len(frame), seed=0)


@pytest.fixture(scope="module")
def cleaned(used: pd.DataFrame, planted: Any) -> pd.DataFrame:
    return used[~used["position"].isin(planted.gross_errors)]


# ── sample_parquet/README.md ─────────────────────────────────────────────────────────────


def test_demo_readme_hc3_ratios(used: pd.DataFrame) -> None:
    said("about 1.5 times the classical one for `distance_km`, 1.3 for `weight_kg`")
    said("and about 1 for `stops`")
    fit = smf.ols(STRAIGHT, used).fit()
    ratio = np.asarray(fit.get_robustcov_results("HC3").bse) / np.asarray(fit.bse)
    names = list(fit.params.index)
    assert ratio[names.index("distance_km")] == pytest.approx(1.5, abs=0.1)
    assert ratio[names.index("weight_kg")] == pytest.approx(1.3, abs=0.1)
    assert ratio[names.index("stops")] == pytest.approx(1.0, abs=0.1)


def test_demo_readme_long_haul_rows(used: pd.DataFrame, planted: Any) -> None:
    from statsmodels.stats.outliers_influence import OLSInfluence

    said("They have the highest leverage of all rows.")
    said("about −120 minutes on average")
    said("(10 of the 30 largest; the gross errors below take most of the others)")
    said("dragging the `weight_kg` slope from 0.15 to about 0.06")
    fit = smf.ols(STRAIGHT, used).fit()
    influence = OLSInfluence(fit)
    positions = used["position"].to_numpy()
    cluster = np.isin(positions, planted.leverage)
    top_leverage = np.argsort(-influence.hat_matrix_diag)[: cluster.sum()]
    assert cluster[top_leverage].all()
    assert fit.resid[cluster].mean() == pytest.approx(-120, abs=10)
    top_cooks = np.argsort(-influence.cooks_distance[0])[:30]
    assert cluster[top_cooks].sum() == 10
    assert np.isin(positions[top_cooks], planted.gross_errors).sum() >= 15
    assert fit.params["weight_kg"] == pytest.approx(0.06, abs=0.01)


def test_demo_readme_slope_with_a_curved_distance_term(cleaned: pd.DataFrame) -> None:
    said("the slope is back near 0.15 (about 0.18)")
    curved = smf.ols(
        "minutes ~ distance_km + I(distance_km**2) + stops + weight_kg + C(vehicle) + C(depot)",
        cleaned,
    ).fit()
    assert curved.params["weight_kg"] == pytest.approx(0.18, abs=0.01)
    # "a squared or log distance term is clearly significant (its p-value underflows to 0)"
    said("its p-value underflows to 0 on this file, statsmodels OLS")
    assert curved.pvalues["I(distance_km ** 2)"] == 0.0


def test_demo_readme_gross_errors_and_the_airport_depot(
    used: pd.DataFrame, cleaned: pd.DataFrame
) -> None:
    said("the rare `airport` depot picks up a coefficient of about +13 minutes from them alone")
    formula = STRAIGHT + " + C(depot, Treatment('north'))"
    name = "C(depot, Treatment('north'))[T.airport]"
    assert smf.ols(formula, used).fit().params[name] == pytest.approx(13, abs=1)
    assert abs(smf.ols(formula, cleaned).fit().params[name]) < 2


def test_demo_readme_east_depot(cleaned: pd.DataFrame) -> None:
    said("(about +4.8 against about −1.1 for every other depot, after removing the gross errors)")
    said("with a depot term its coefficient is about +6 and the others are near 0")
    fit = smf.ols(STRAIGHT, cleaned).fit()
    means = cleaned.assign(r=fit.resid).groupby("depot")["r"].mean()
    assert means["east"] == pytest.approx(4.8, abs=0.1)
    assert all(-1.35 < means[d] < -1.0 for d in means.index if d != "east")
    with_depot = smf.ols(STRAIGHT + " + C(depot, Treatment('north'))", cleaned).fit()
    assert with_depot.params["C(depot, Treatment('north'))[T.east]"] == pytest.approx(6, abs=0.5)


def test_demo_readme_counts(frame: pd.DataFrame, used: pd.DataFrame) -> None:
    said("Depot `airport` holds 415 rows (0.4 %)")
    said("0.5 % of `distance_km` (497 rows) and, independently, 0.5 % of `weight_kg` (456")
    said("drops 950 rows (1 %) for missing values and keeps 99,050")
    assert (frame["depot"] == "airport").sum() == 415
    assert frame["distance_km"].isna().sum() == 497 and frame["weight_kg"].isna().sum() == 456
    assert len(frame) - len(used) == 950 and len(used) == 99_050


# ── README.md: the tour, as triage shows it ──────────────────────────────────────────────


@pytest.fixture(scope="module")
def tour() -> ReportOutcome:
    source = open_source(DEMO)
    spec = build_spec(source.schema(), target="minutes", terms=TOUR_TERMS)
    return run_report(source, spec, rows=ALL_ROWS, top_k=50, by=("depot",))


def test_readme_tour_fit_and_flags(tour: ReportOutcome) -> None:
    said("950 of 100,000 rows were dropped for missing values; R² is only about 0.14", README)
    data, fit = tour.outcome.data, tour.outcome.fit
    assert data.rows_dropped_missing == 950 and data.rows_in_source == 100_000
    assert fit.r2 == pytest.approx(0.14, abs=0.005)
    said("40 rows with a studentized residual beyond the Bonferroni bound (about ±5)", README)
    said("Breusch–Pagan and RESET below 0.01, heavy tails", README)
    counts = tour.diagnostics.counts
    assert counts.extreme == 40 and counts.extreme_threshold == pytest.approx(5, abs=0.1)
    assert tour.diagnostics.tests["breusch_pagan"].p_value < 0.01
    assert tour.diagnostics.tests["reset"].p_value < 0.01
    codes = {flag.code for flag in tour.diagnostics.flags}
    assert {"large-studentized", "spread-changes", "curvature", "tails"} <= codes


def test_readme_tour_gross_errors(tour: ReportOutcome, planted: Any) -> None:
    from triage.views.charts import histogram_view

    said("the median ± 4 robust SDs, from the interquartile range", README)
    said("about 200 above its right edge, the 40 gross errors far out among them", README)
    view = histogram_view(tour.diagnostics.histogram, bars=36)
    assert view.is_robust and view.above == pytest.approx(200, abs=15)
    assert view.edges[-1] < 10_000 - 200  # the gross errors (observed about 60x) lie beyond
    said("the studentized residuals' quantiles against a normal's lie almost flat", README)
    said("within about ±0.7 from the 0.1% to the 99.9% point, far off the line", README)
    quantiles = tour.diagnostics.studentized_quantiles
    assert (min(quantiles), max(quantiles)) == (0.001, 0.999)
    assert all(abs(q) < 0.75 for q in quantiles.values())
    said('row 3,883 took 10,260 "minutes" where the model expects about 200', README)
    said("they are all such rows", README)
    top = tour.diagnostics.worst["abs_resid"][0]
    assert top.row == 3_883 and top.fitted + top.resid == pytest.approx(10_260)
    assert top.fitted == pytest.approx(200, abs=10)
    worst_40 = [r.row for r in tour.diagnostics.worst["abs_resid"][:40]]
    assert set(worst_40) <= set(planted.gross_errors.tolist())


def test_readme_tour_leverage_cluster(tour: ReportOutcome, frame: pd.DataFrame) -> None:
    said("by leverage the top rows are truck runs of 160–240 km with a tonne aboard", README)
    top = [r.row for r in tour.diagnostics.worst["leverage"][:20]]
    rows = frame.set_index("position").loc[top]
    assert (rows["vehicle"] == "truck").all()
    assert rows["distance_km"].between(160, 240).all()
    assert (rows["weight_kg"] >= 900).all()


def test_readme_tour_east_and_airport(tour: ReportOutcome) -> None:
    said("`east` ranks first with a mean residual of about +5.6 minutes (t about 6)", README)
    said("`airport` has only 413 rows (of 415 in the file: 2 miss a value)", README)
    levels = tour.diagnostics.segments["depot"]
    assert levels[0].level == "east"
    assert levels[0].mean_resid == pytest.approx(5.6, abs=0.1)
    assert levels[0].t == pytest.approx(6, abs=0.5)
    assert next(lv for lv in levels if lv.level == "airport").n == 413


def test_readme_tour_curvature_check() -> None:
    from triage.engine.compare import curvature_check_outcome
    from triage.engine.passes import fit_model

    said("a spline of `distance_km` lowers the median absolute held-out error by about 15%", README)
    said("though the 40 gross errors leave its RMSE gain under 1%", README)
    source = open_source(DEMO)
    spec = build_spec(source.schema(), target="minutes", terms=TOUR_TERMS)
    check = curvature_check_outcome(fit_model(source, spec))
    top = check.predictors[0]
    assert check.flagged == ("distance_km",) and top.predictor == "distance_km"
    assert top.robust_gain == pytest.approx(0.15, abs=0.02)
    assert top.relative_gain < 0.01


# ── README.md: the usage examples run as written ─────────────────────────────────────────


def _commands(section: str) -> list[list[str]]:
    body = README.split(section, 1)[1]
    block = body.split("```sh\n", 1)[1].split("```", 1)[0]
    joined = block.replace("\\\n", " ")
    return [shlex.split(line) for line in joined.splitlines() if line.startswith("triage ")]


USAGE = _commands("## Usage")


@pytest.mark.parametrize("argv", USAGE, ids=[" ".join(a[:2]) for a in USAGE])
def test_readme_usage_example_runs_from_the_repository_root(
    argv: list[str],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.chdir(ROOT)
    args = [re.sub(r"^/tmp/", f"{tmp_path}/", a) for a in argv[1:]]
    if args[0] == "sample":  # the same command at 20,000 rows instead of 20 million
        args[args.index("--rows") + 1] = "20000"
    if args[0] == "open":  # starts the app: check that the command line is read as written
        from triage.cli.commands.open import settings_from_args

        settings = settings_from_args(build_parser().parse_args(args))
        assert settings.target == "minutes" and settings.top_k == 30
        return
    assert main(args) == 0
    out = capsys.readouterr().out
    assert out.strip()
    for written in [a for a in args if a.startswith(str(tmp_path))]:
        assert Path(written).stat().st_size > 0


def test_readme_columns_pane_sample_and_every_row_maximum() -> None:
    # Oracle: polars on the whole bundled file; the sample is the app's own profile.
    from triage.engine.passes import fit_model
    from triage.tui.head_start import open_and_profile
    from triage.tui.settings import Settings

    said("the sample's highest `minutes` is `~8430`", README)
    said("the model's columns from every row, unmarked (`10260`)", README)
    opened = open_and_profile(str(DEMO), csv=None, seed=Settings().seed)
    profile = {row["name"]: row for row in opened.profile.iter_rows(named=True)}
    assert round(profile["minutes"]["high"]) == 8430
    spec = build_spec(opened.source.schema(), target="minutes", terms=TOUR_TERMS)
    figures = fit_model(opened.source, spec, rows=ALL_ROWS, column_figures=True).column_figures
    every_row = next(f for f in figures if f.name == "minutes")
    assert every_row.high == pl.read_parquet(DEMO)["minutes"].max() == 10260


def test_readme_names_every_command() -> None:
    from triage.cli.main import COMMANDS

    named = {argv[1] for argv in USAGE}
    assert set(COMMANDS) <= named


# ── running on a cluster (the claims that need a LocalCluster are in test_cluster.py) ───────


def test_readme_cluster_tasks_per_source(tmp_path: Path) -> None:
    said(
        "Parquet (a file, folder or glob) gives a task per file, or per run of row groups "
        "of at least 500,000 rows; an Arrow IPC file a task per run of record batches of at "
        "least 500,000 rows. Each task knows the position of its first row from the "
        "metadata, so row positions are those of the whole table. A CSV file is one task",
        README,
    )
    said(
        "A folder or glob of CSV files is a task per file; the machine running triage counts "
        "each file's rows first",
        README,
    )
    import pyarrow as pa
    import pyarrow.ipc as ipc

    from triage.data.scenario import iter_scenario

    # the demo table, sorted by delivery id, in blocks of 200,000 rows: runs of 3 blocks
    frame = pl.concat(iter_scenario(1_200_000, seed=3)).select("delivery_id", "depot")
    frame.write_parquet(tmp_path / "d.parquet", row_group_size=200_000)
    table = frame.to_arrow().combine_chunks()
    with pa.OSFile(str(tmp_path / "d.arrow"), "wb") as sink, ipc.new_file(sink, table.schema) as w:
        w.write_table(table, max_chunksize=200_000)
    frame.head(1_000).write_csv(tmp_path / "d.csv")
    (tmp_path / "csv").mkdir()
    frame.slice(1_000, 600).write_csv(tmp_path / "csv" / "a.csv")
    frame.slice(1_600, 400).write_csv(tmp_path / "csv" / "b.csv")
    for name, starts in [
        ("d.parquet", [0, 600_000]),
        ("d.arrow", [0, 600_000]),
        ("d.csv", [0]),
        ("csv", [0, 600]),
    ]:
        parts = open_source(tmp_path / name).scan_parts(["delivery_id"])
        assert [part.start for part in parts] == starts, name  # type: ignore[attr-defined]
        first_rows = [next(iter(part())).frame[ROW_INDEX][0] for part in parts]
        assert first_rows == starts, name


def test_readme_urls_name_parquet_or_ipc_files(tmp_path: Path) -> None:
    said(
        "A URL names a Parquet or Arrow IPC file, or a folder or glob of Parquet files",
        README,
    )
    said("A CSV file is read from a disk, not from a URL.", README)
    frame = pl.DataFrame({"code": [3, 1, 2], "depot": ["north", "north", None]})
    frame.write_csv(tmp_path / "d.csv")
    with pytest.raises(SourceError, match="must name a Parquet"):
        open_source((tmp_path / "d.csv").as_uri())
    frame.write_parquet(tmp_path / "d.parquet")
    root = tmp_path.as_uri()
    for url in [(tmp_path / "d.parquet").as_uri(), root, f"{root}/*.parquet"]:
        assert open_source(url).row_count() == 3


# ── legibility at 80 columns ─────────────────────────────────────────────────────────────


def _tables(text: str) -> list[list[str]]:
    """Each table of a text report (a heading line over a ╌ rule) as its row labels."""
    lines = text.split("\n")
    found = []
    for i, line in enumerate(lines):
        if i and line.lstrip().startswith("╌"):
            start = len(line) - len(line.lstrip())
            width = len(line.lstrip().split("  ")[0])
            gaps = [k for k, char in enumerate(line) if k >= start and char == " "]
            rows = []
            for row in lines[i + 1 :]:
                if all(k >= len(row) or row[k] == " " for k in gaps) and row.strip():
                    rows.append(row[start : start + width].strip())
                elif start and row.strip():
                    continue  # a question heading between groups of rows
                else:
                    break  # a blank line or a note under the table
            found.append(rows)
    return found


def test_no_two_rows_of_a_table_at_80_columns_share_a_label() -> None:
    """Long indicator, transform and interaction names stay whole and told apart."""
    from triage.engine.compare import compare_models
    from triage.views.compare import render_comparison
    from triage.views.text import render_full_report

    source = open_source(DEMO)
    terms = (
        "poly(distance_km, 3), log(weight_kg), distance_km:weight_kg, stops, hour, vehicle, depot"
    )
    spec = build_spec(source.schema(), target="minutes", terms=terms)
    report = run_report(source, spec, rows=20_000, top_k=5, by=("depot", "vehicle"))
    texts = [render_full_report(report, width=80, charts=False, is_ordered=True)]
    plain = build_spec(source.schema(), target="minutes", terms=TOUR_TERMS)
    comparison = compare_models(source, [plain, spec], [TOUR_TERMS, terms], rows=20_000)
    texts.append(render_comparison(comparison, width=80))
    tables = [labels for text in texts for labels in _tables(text)]
    assert len(tables) >= 10
    for text in texts:
        assert max(len(line) for line in text.split("\n")) <= 80
    for labels in tables:
        assert len(labels) == len(set(labels)), labels
        assert not any(label.endswith("…") for label in labels), labels
    names = report.outcome.fit.names
    coefficient_tables = [t for t in tables if set(t) == set(names)]
    assert coefficient_tables  # every design column, whole, e.g. `vehicle=cargo_bike`


# ── README.md: indicator terms and columns with no rows left ────────────────────────────


def test_readme_indicator_terms_on_the_demo(frame: pd.DataFrame) -> None:
    # Oracle: statsmodels OLS with the same indicators built by hand (pandas `==`).
    said("`depot=east` (the older `depot[east]` is read too) is one column, 1 where", README)
    said("`hour=8` on a column of whole numbers (`hour=08` is the same)", README)
    said("`distance_km:vehicle=truck` is the difference between the slope of distance", README)
    source = open_source(DEMO)
    terms = "distance_km, stops, depot[east], hour=08, vehicle=truck, distance_km:vehicle=truck"
    spec = build_spec(source.schema(), target="minutes", terms=terms)
    fit = run_report(source, spec, rows=ALL_ROWS, top_k=1).outcome.fit
    assert fit.names[3:] == ("depot=east", "hour=8", "vehicle=truck", "distance_km:vehicle=truck")
    data = frame.assign(
        east=(frame["depot"] == "east").astype(float),
        eight=(frame["hour"] == 8).astype(float),
        truck=(frame["vehicle"] == "truck").astype(float),
    )
    oracle = smf.ols(
        "minutes ~ distance_km + stops + east + eight + truck + distance_km:truck", data
    )
    np.testing.assert_allclose(fit.coef, oracle.fit().params, rtol=1e-8)


def test_readme_indicator_level_no_row_holds_is_refused(tmp_path: Path) -> None:
    message = (
        "`depot` has no level `eest` in the sample (the term `depot=eest`); its levels there: "
        "`airport`, `east`, `harbour`, `north`, `south`, `west`"
    )
    said(f"`` {message} ``", README)
    said("so a level found only at the end of a sorted file is found", README)
    from triage.engine.passes import fit_model
    from triage.errors import SpecError

    source = open_source(DEMO)
    spec = build_spec(source.schema(), target="minutes", terms="distance_km, depot=eest")
    with pytest.raises(SpecError) as error:
        fit_model(source, spec)
    assert str(error.value) == message
    # A copy sorted by depot: `west` lies in its last row groups only.
    ordered = tmp_path / "by_depot.parquet"
    pl.read_parquet(DEMO).sort("depot").write_parquet(ordered, row_group_size=5_000)
    source = open_source(ordered)
    spec = build_spec(source.schema(), target="minutes", terms="distance_km, depot=west")
    assert fit_model(source, spec, rows=ALL_ROWS).fit.names[-1] == "depot=west"


def test_readme_no_rows_left_apart_from_aliasing(tmp_path: Path) -> None:
    # Oracle: numpy's matrix rank of the design on the rows used (the airport column is all
    # zero there; distance in miles is distance in km in other units).
    said(
        'under `no_rows_left` (*terms with no rows left*, "no rows left after missing values")',
        README,
    )
    from triage.engine.passes import fit_model
    from triage.views.json import fit_to_json
    from triage.views.text import render_aliased

    table = pl.read_parquet(DEMO).with_columns(
        pl.when(pl.col("depot") == "airport")
        .then(None)
        .otherwise(pl.col("weight_kg"))
        .alias("weight_kg"),
        (pl.col("distance_km") / 1.609344).alias("distance_miles"),
    )
    path = tmp_path / "airport_weights_missing.parquet"
    table.write_parquet(path)
    source = open_source(path)
    terms = "distance_km, weight_kg, depot, distance_miles"
    outcome = fit_model(source, build_spec(source.schema(), target="minutes", terms=terms))
    document = fit_to_json(outcome)
    assert document["aliased"] == ["distance_miles"]
    assert document["no_rows_left"] == ["depot=airport"]
    text = render_aliased(outcome.fit, width=80)
    assert "aliased terms" in text and "terms with no rows left" in text
    assert "no rows left after missing values" in text
    used = table.with_row_index("__row").drop_nulls(["distance_km", "weight_kg", "minutes"])
    design = outcome.builder.build(used).x
    assert np.linalg.matrix_rank(design) == design.shape[1] - 2
