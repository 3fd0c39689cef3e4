"""The tool finds every problem planted in the demo data (issues 3 and 5).

The planted positions come from the generator (`triage.data.scenario.planted_positions`),
the statistics from triage's own passes; the oracle for what is "planted" is the generator's
documented design, and the thresholds are common practice (|studentized| > 3, p < 0.01).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from triage._typing import ALL_ROWS
from triage.core.spec import build_spec
from triage.data.scenario import planted_positions, write_scenario
from triage.data.source import open_source
from triage.engine.passes import run_report

N_ROWS = 100_000
SEED = 0
DEMO = Path(__file__).resolve().parents[1] / "sample_parquet" / "deliveries.parquet"


@pytest.fixture(scope="module")
def demo_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The bundled demo file, or the same scenario regenerated when it is absent."""
    if DEMO.exists():
        return DEMO
    path = tmp_path_factory.mktemp("demo") / "deliveries.parquet"
    write_scenario(path, n_rows=N_ROWS, seed=SEED)
    return path


@pytest.fixture(scope="module")
def straight_line_report(demo_path: Path):  # type: ignore[no-untyped-def]
    """The naive model a new user would try first, with depot left out and broken down by."""
    source = open_source(demo_path)
    spec = build_spec(
        source.schema(),
        target="minutes",
        terms="distance_km, stops, weight_kg, hour, vehicle",
    )
    planted = planted_positions(source.row_count() or 0, seed=SEED)
    top_k = len(planted.gross_errors) + 20
    return run_report(source, spec, rows=ALL_ROWS, top_k=top_k, by=("depot",)), planted


def test_planted_gross_errors_are_among_the_worst_rows(straight_line_report) -> None:  # type: ignore[no-untyped-def]
    report, planted = straight_line_report
    worst = {entry.row for entry in report.diagnostics.worst["studentized"]}
    missing = set(planted.gross_errors.tolist()) - worst
    # a gross error on a row with a missing predictor is dropped before the fit, so it cannot rank
    dropped = {row for row in missing if row not in _used_rows(report)}
    assert missing == dropped


def _used_rows(report) -> set[int]:  # type: ignore[no-untyped-def]
    sample = report.outcome.sample
    batch = report.outcome.builder.build(sample)
    return set(batch.rows.tolist())


def test_planted_biased_depot_ranks_first(straight_line_report) -> None:  # type: ignore[no-untyped-def]
    report, _ = straight_line_report
    segments = report.diagnostics.segments["depot"]
    assert segments[0].level == "east"
    assert segments[0].mean_resid > 0


def test_planted_spread_and_curvature_are_flagged(straight_line_report) -> None:  # type: ignore[no-untyped-def]
    report, _ = straight_line_report
    tests = report.diagnostics.tests
    assert tests["breusch_pagan"].p_value < 0.01
    assert tests["reset"].p_value < 0.01
    codes = {flag.code for flag in report.diagnostics.flags}
    assert {"spread-changes", "curvature"} <= codes


def test_planted_leverage_cluster_tops_the_leverage_list(straight_line_report) -> None:  # type: ignore[no-untyped-def]
    report, planted = straight_line_report
    top = [entry.row for entry in report.diagnostics.worst["leverage"]]
    cluster = set(planted.leverage.tolist()) & _used_rows(report)
    assert cluster <= set(top[: len(cluster) + 5])
    n, p = report.outcome.fit.n, len(report.outcome.fit.names)
    leverages = np.array([entry.leverage for entry in report.diagnostics.worst["leverage"]])
    assert (leverages[: len(cluster)] > 2 * p / n).all()  # common practice: 2p/n
