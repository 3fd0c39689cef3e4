"""Pass-2 diagnostics against statsmodels, scipy, numpy and polars as oracles.

Data are invented here (small, seeded). Oracles are named beside each check. For weighted fits
the reference is statsmodels given the WLS results (``res.wresid``, ``res.model.exog``), or the
whitened OLS regression of ``√w·y`` on ``√w·X`` where statsmodels' influence tools take the
unweighted residuals (see the module docstring of triage.core.diagnostics).
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import pickle

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.diagnostic import het_breuschpagan, linear_reset
from statsmodels.stats.outliers_influence import OLSInfluence
from statsmodels.stats.stattools import durbin_watson, jarque_bera

from triage._typing import CRITERIA
from triage.core.binning import (
    EDGE_SAMPLE_VALUES,
    edge_sample,
    pack_counts,
    quantile_edges,
    unpack_counts,
)
from triage.core.design import DesignBatch
from triage.core.diagnostics import DiagnosticsAccumulator
from triage.core.diagnostics_config import DiagnosticsConfig, default_config
from triage.core.flag_rules import poisson_at_least
from triage.core.lsq import LinearFit, QRAccumulator, UncertifiedGram
from triage.core.moments import StreamMoments, pool_groups, pool_values
from triage.core.residual_breakdown import MISSING_LEVEL, OTHER_LEVEL, SegmentResiduals
from triage.core.residual_tests import TESTS_FROM_FIT_MAX_CONDITION
from triage.core.row_values import row_diagnostics
from triage.core.worst_rows import TopRows
from triage.errors import SpecError
from triage.results.diagnostics import Diagnostics
from triage.views.flags import flag_message

NAMES = ("intercept", "a", "b", "a:b")
RTOL = 1e-8


# --------------------------------------------------------------------------- helpers


def make_data(rng: np.random.Generator, n: int = 240) -> dict[str, np.ndarray]:
    """Invented data with curvature, spread growing with `a`, a biased group and a few outliers."""
    a = rng.uniform(0.0, 4.0, n)
    b = rng.normal(10.0, 2.0, n)
    g = rng.choice(np.array(["north", "south", "east", "west", "hub"]), n)
    u = rng.uniform(0.0, 100.0, n)
    noise = rng.normal(0.0, 0.5 + 0.4 * a, n)
    y = 3.0 + 1.5 * a - 0.7 * b + 0.2 * a * b + 0.3 * a**2 + noise + 0.8 * (g == "hub")
    y[[17, 101]] += 9.0
    w = rng.uniform(0.5, 2.0, n)
    return {"a": a, "b": b, "g": g, "u": u, "y": y, "w": w}


def design(data: dict[str, np.ndarray]) -> np.ndarray:
    a, b = data["a"], data["b"]
    return np.column_stack([np.ones(a.size), a, b, a * b])


def fit_of(x: np.ndarray, y: np.ndarray, w: np.ndarray | None) -> LinearFit:
    acc = QRAccumulator(x.shape[1], has_intercept=True)
    acc.update(x, y, w)
    return acc.finalize(NAMES)


def batch_of(
    data: dict[str, np.ndarray], x: np.ndarray, w: np.ndarray | None, lo: int, hi: int
) -> DesignBatch:
    rows = np.arange(lo, hi, dtype=np.int64)
    frame = pl.DataFrame(
        {
            "a": data["a"][lo:hi],
            "b": data["b"][lo:hi],
            "g": data["g"][lo:hi],
            "u": data["u"][lo:hi],
            "__row": rows,
        }
    )
    return DesignBatch(
        x=x[lo:hi],
        y=data["y"][lo:hi],
        weights=None if w is None else w[lo:hi],
        rows=rows,
        frame=frame,
        n_dropped_missing=0,
        n_dropped_domain=0,
        n_dropped_unseen_level=0,
    )


def config_for(
    fit: LinearFit, data: dict[str, np.ndarray], x: np.ndarray, **kw
) -> DiagnosticsConfig:
    sample = slice(0, 150)  # a sample stands in for what pass 1 would have kept in memory
    return default_config(
        fit,
        fit.predict(x[sample]),
        {"a": data["a"][sample], "b": data["b"][sample]},
        ("g", "u"),
        {"g": pl.Series(data["g"][sample]), "u": pl.Series(data["u"][sample])},
        **kw,
    )


def run(
    fit: LinearFit, config: DiagnosticsConfig, batches: list[DesignBatch]
) -> DiagnosticsAccumulator:
    acc = DiagnosticsAccumulator(fit, config)
    for batch in batches:
        acc.update(batch)
    return acc


def cuts(n: int, pieces: int, rng: np.random.Generator) -> list[tuple[int, int]]:
    inner = np.sort(rng.choice(np.arange(1, n), pieces - 1, replace=False))
    bounds = [0, *inner.tolist(), n]
    return list(itertools.pairwise(bounds))


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20260117)


@pytest.fixture(params=[False, True], ids=["ols", "wls"])
def case(request: pytest.FixtureRequest, rng: np.random.Generator):
    data = make_data(rng)
    x = design(data)
    w = data["w"] if request.param else None
    fit = fit_of(x, data["y"], w)
    res = sm.OLS(data["y"], x).fit() if w is None else sm.WLS(data["y"], x, weights=w).fit()
    return data, x, w, fit, res


# --------------------------------------------------------------------------- per-row values


def test_row_diagnostics_match_statsmodels_influence(case) -> None:
    data, x, w, fit, res = case
    rd = row_diagnostics(fit, batch_of(data, x, w, 0, x.shape[0]))
    # statsmodels OLSInfluence; for WLS on the whitened regression sqrt(w)*y on sqrt(w)*X,
    # since OLSInfluence of WLS results mixes raw residuals with whitened hat values.
    sw = np.ones_like(data["y"]) if w is None else np.sqrt(w)
    infl = OLSInfluence(sm.OLS(sw * data["y"], sw[:, None] * x).fit())
    np.testing.assert_allclose(rd.fitted, res.fittedvalues, rtol=RTOL)  # statsmodels
    np.testing.assert_allclose(rd.resid, res.resid, rtol=RTOL, atol=1e-12)  # statsmodels
    np.testing.assert_allclose(rd.weighted_resid, res.wresid, rtol=RTOL, atol=1e-12)
    np.testing.assert_allclose(rd.leverage, infl.hat_matrix_diag, rtol=RTOL)
    np.testing.assert_allclose(rd.student_internal, infl.resid_studentized_internal, rtol=RTOL)
    np.testing.assert_allclose(rd.studentized, infl.resid_studentized_external, rtol=RTOL)
    np.testing.assert_allclose(rd.cooks, infl.cooks_distance[0], rtol=RTOL)


def test_row_diagnostics_leverage_one_and_no_residual_df_give_nan() -> None:
    # A dummy with a single row forces h = 1 for that row (exact algebra, no oracle needed:
    # the row's own coefficient fits it exactly); statsmodels would divide by zero there.
    rng = np.random.default_rng(5)
    n = 30
    a = rng.normal(size=n)
    lone = np.zeros(n)
    lone[7] = 1.0
    x = np.column_stack([np.ones(n), a, lone])
    y = 1.0 + a + rng.normal(size=n)
    fit = QRAccumulator(3, has_intercept=True)
    fit.update(x, y)
    lin = fit.finalize(("intercept", "a", "lone"))
    frame = pl.DataFrame({"__row": np.arange(n)})
    batch = DesignBatch(x, y, None, np.arange(n, dtype=np.int64), frame, 0, 0, 0)
    rd = row_diagnostics(lin, batch)
    assert rd.leverage[7] == pytest.approx(1.0, abs=1e-12)
    for values in (rd.student_internal, rd.studentized, rd.cooks):
        assert math.isnan(values[7])
        assert np.all(np.isfinite(np.delete(values, 7)))
    # The dummy absorbs row 7 entirely, so on the other rows the fit (RSS, residual df, hat
    # values) is that of the model without row 7 and without the dummy: statsmodels as oracle.
    keep = np.arange(n) != 7
    infl = OLSInfluence(sm.OLS(y[keep], x[keep][:, :2]).fit())
    np.testing.assert_allclose(rd.studentized[keep], infl.resid_studentized_external, rtol=RTOL)
    np.testing.assert_allclose(rd.cooks[keep] * 3 / 2, infl.cooks_distance[0], rtol=RTOL)

    # As many rows as coefficients: no residual df, so studentized values are NaN.
    x3 = np.array([[1.0, 0.0, 0.0], [1.0, 1.0, 0.0], [1.0, 0.0, 1.0]])
    exact = QRAccumulator(3, has_intercept=True)
    exact.update(x3, y[:3])
    lin3 = exact.finalize(("intercept", "a", "lone"))
    batch3 = DesignBatch(x3, y[:3], None, np.arange(3, dtype=np.int64), frame[:3], 0, 0, 0)
    rd3 = row_diagnostics(lin3, batch3)
    assert lin3.df_resid == 0
    assert np.all(np.isnan(rd3.studentized)) and np.all(np.isnan(rd3.cooks))


# --------------------------------------------------------------------------- tests, HC, histogram


@pytest.mark.parametrize("exact_tests", [False, True], ids=["from-fit", "refactored"])
def test_diagnostics_tests_and_robust_se_match_statsmodels(case, exact_tests: bool) -> None:
    # Breusch–Pagan (without weights) and RESET come from the fit's factor and the added
    # columns' cross-products, or (exact_tests) from auxiliary regressions factored again:
    # both against statsmodels.
    data, x, w, fit, res = case
    config = dataclasses.replace(config_for(fit, data, x), exact_tests=exact_tests)
    assert config.fit_condition <= TESTS_FROM_FIT_MAX_CONDITION  # so the fit's route is taken
    diag = run(fit, config, [batch_of(data, x, w, lo, hi) for lo, hi in [(0, 90), (90, 240)]])
    diag = diag.finalize()

    # statsmodels het_breuschpagan, robust=True is Koenker's studentized LM.
    lm, lm_p, _, _ = het_breuschpagan(res.wresid, res.model.exog, robust=True)
    bp = diag.tests["breusch_pagan"]
    assert bp.statistic == pytest.approx(lm, rel=RTOL)
    assert bp.p_value == pytest.approx(lm_p, rel=1e-6)
    assert bp.df == (3.0,)

    # RESET with fitted^2, fitted^3, F form. statsmodels' linear_reset refits without weights,
    # so for WLS the oracle is the same Wald F on a WLS refit with the weights.
    if w is None:
        ref = linear_reset(res, power=3, test_type="fitted", use_f=True)
    else:
        aug = np.column_stack([x, res.fittedvalues**2, res.fittedvalues**3])
        ref = (
            sm.WLS(data["y"], aug, weights=w)
            .fit()
            .wald_test(np.eye(2, 6, k=4), use_f=True, scalar=True)
        )
    reset = diag.tests["reset"]
    assert reset.statistic == pytest.approx(float(ref.fvalue), rel=1e-7)
    assert reset.p_value == pytest.approx(float(ref.pvalue), rel=1e-5)
    assert reset.df == (2.0, float(ref.df_denom))

    # statsmodels jarque_bera and durbin_watson on the weighted residuals.
    jb, jb_p, skew, kurt = jarque_bera(res.wresid)
    assert diag.tests["jarque_bera"].statistic == pytest.approx(jb, rel=RTOL)
    assert diag.tests["jarque_bera"].p_value == pytest.approx(jb_p, rel=1e-6)
    assert diag.resid_skewness == pytest.approx(skew, rel=RTOL)
    assert diag.resid_kurtosis == pytest.approx(kurt, rel=RTOL)
    assert diag.tests["durbin_watson"].statistic == pytest.approx(
        durbin_watson(res.wresid), rel=RTOL
    )

    # statsmodels HC0_se .. HC3_se (WLS results use the whitened design and residuals).
    for kind in ("hc0", "hc1", "hc2", "hc3"):
        ours = [getattr(diag.robust_se[name], kind) for name in NAMES]
        np.testing.assert_allclose(ours, getattr(res, kind.upper() + "_se"), rtol=RTOL)


def test_diagnostics_histogram_and_quantiles_match_numpy(case) -> None:
    data, x, w, fit, res = case
    config = config_for(fit, data, x)
    diag = run(fit, config, [batch_of(data, x, w, 0, 240)]).finalize()
    e = np.asarray(res.wresid)
    edges = config.hist_edges
    counts, _ = np.histogram(e, bins=edges)  # numpy.histogram: same half-open bins
    np.testing.assert_array_equal(diag.histogram.counts, counts)
    assert diag.histogram.below == int(np.sum(e < edges[0]))
    assert diag.histogram.above == int(np.sum(e > edges[-1]))
    assert diag.histogram.minimum == pytest.approx(e.min(), rel=RTOL)
    assert diag.histogram.maximum == pytest.approx(e.max(), rel=RTOL)
    width = config.fine_edges[1] - config.fine_edges[0]
    for prob, value in diag.histogram.quantiles.items():
        assert abs(value - np.quantile(e, prob)) <= width  # numpy.quantile, one fine bin


def test_diagnostics_binned_quantiles_within_one_fine_bin(case) -> None:
    data, x, w, fit, res = case
    config = config_for(fit, data, x)
    diag = run(fit, config, [batch_of(data, x, w, lo, hi) for lo, hi in [(0, 77), (77, 240)]])
    diag = diag.finalize()
    e = np.asarray(res.wresid)
    width = config.fine_edges[1] - config.fine_edges[0]
    # Our own fitted values place rows in bins: statsmodels' may differ in the last bit and
    # cross an edge (edges are sample quantiles, often equal to a fitted value).
    fitted = row_diagnostics(fit, batch_of(data, x, w, 0, 240)).fitted
    np.testing.assert_allclose(fitted, res.fittedvalues, rtol=RTOL)  # statsmodels
    values = {"fitted": fitted, "a": data["a"], "b": data["b"]}
    assert set(diag.binned) == set(values)
    for name, bins in diag.binned.items():
        v = values[name]
        assert sum(b.n for b in bins) == v.size
        for k, b in enumerate(bins):
            inside = (v >= b.lo) & (v < b.hi) if k < len(bins) - 1 else (v >= b.lo) & (v <= b.hi)
            assert b.n == int(inside.sum())
            if b.n == 0:
                continue
            assert b.mean_resid == pytest.approx(e[inside].mean(), rel=1e-9, abs=1e-12)
            for q, got in zip((0.1, 0.5, 0.9), (b.q10, b.q50, b.q90), strict=True):
                assert abs(got - np.quantile(e[inside], q)) <= width  # numpy.quantile


# --------------------------------------------------------------------------- streaming and merging


def assert_same(one: Diagnostics, other: Diagnostics) -> None:
    assert one.n == other.n
    np.testing.assert_array_equal(one.histogram.counts, other.histogram.counts)
    assert (one.histogram.below, one.histogram.above) == (
        other.histogram.below,
        other.histogram.above,
    )
    assert one.histogram.quantiles == pytest.approx(other.histogram.quantiles, rel=1e-12)
    for name, bins in one.binned.items():
        assert [b.n for b in bins] == [b.n for b in other.binned[name]]
        assert [b.q50 for b in bins] == pytest.approx(
            [b.q50 for b in other.binned[name]], rel=1e-12
        )
        np.testing.assert_allclose(
            [b.mean_resid for b in bins], [b.mean_resid for b in other.binned[name]], rtol=1e-9
        )
    for criterion in CRITERIA:
        assert [r.row for r in one.worst[criterion]] == [r.row for r in other.worst[criterion]]
    for col, levels in one.segments.items():
        assert [lv.level for lv in levels] == [lv.level for lv in other.segments[col]]
        np.testing.assert_allclose(
            [lv.t for lv in levels], [lv.t for lv in other.segments[col]], rtol=1e-9
        )
    for key, test in one.tests.items():
        assert test.statistic == pytest.approx(other.tests[key].statistic, rel=1e-9)
    for name, se in one.robust_se.items():
        assert se.hc3 == pytest.approx(other.robust_se[name].hc3, rel=1e-9)
    assert one.counts == other.counts
    assert [f.code for f in one.flags] == [f.code for f in other.flags]


def test_diagnostics_streamed_and_merged_equal_one_batch(case, rng) -> None:
    data, x, w, fit, _ = case
    n = x.shape[0]
    config = config_for(fit, data, x, top_k=7)
    whole = run(fit, config, [batch_of(data, x, w, 0, n)]).finalize()
    pieces = [batch_of(data, x, w, lo, hi) for lo, hi in cuts(n, 9, rng)]
    streamed = run(fit, config, pieces).finalize()
    first = run(fit, config, pieces[:4])
    second = run(fit, config, pieces[4:])
    merged = first.merge(second).finalize()
    # Batches dealt out in turn to three accumulators, as a pass split over threads does,
    # merged in reverse: Durbin-Watson must still join the batches in file order.
    dealt = [run(fit, config, pieces[k::3]) for k in range(3)]
    interleaved = dealt[2].merge(dealt[1]).merge(dealt[0]).finalize()
    # Parts pickled on the way, as a cluster ships them (counts packed small and restored)
    parts = [pickle.dumps(run(fit, config, pieces[:4])), pickle.dumps(run(fit, config, pieces[4:]))]
    shipped = pickle.loads(parts[0]).merge(pickle.loads(parts[1]))
    # Oracle: the one-batch pass (itself checked against statsmodels above).
    assert_same(whole, streamed)
    assert_same(whole, merged)
    assert_same(whole, interleaved)
    assert_same(whole, shipped.finalize())


def test_packed_counts_come_back_exactly() -> None:
    # numpy as oracle: every count comes back equal and int64, whatever type it was packed in
    for top in (0, 255, 256, 65_536, 2**33):
        counts = np.array([[0, 1, top], [top, 3, 0]], dtype=np.int64)
        restored = unpack_counts(pack_counts(counts))
        assert restored.dtype == np.int64
        np.testing.assert_array_equal(restored, counts)
    assert np.dtype(pack_counts(np.array([255]))[0]) == np.uint8


def test_diagnostics_merge_rejects_another_fit(case) -> None:
    data, x, w, fit, _ = case
    other_fit = fit_of(x[:100], data["y"][:100], None if w is None else w[:100])
    config = config_for(fit, data, x)
    with pytest.raises(SpecError, match="different fit"):
        DiagnosticsAccumulator(fit, config).merge(DiagnosticsAccumulator(other_fit, config))


# --------------------------------------------------------------------------- worst rows


def test_top_rows_equal_full_sort_with_ties() -> None:
    rng = np.random.default_rng(11)
    scores = rng.integers(0, 6, 500).astype(float)  # many ties
    scores[[3, 250, 499]] = np.nan
    rows = np.arange(500, dtype=np.int64)
    top = TopRows(25, ("v",))
    for lo, hi in [(0, 40), (40, 41), (41, 300), (300, 500)]:
        top.update(scores[lo:hi], rows[lo:hi], {"v": -scores[lo:hi]})
    ok = ~np.isnan(scores)
    # numpy lexsort as oracle: score descending, row ascending
    order = np.lexsort((rows[ok], -scores[ok]))[:25]
    np.testing.assert_array_equal(top.rows, rows[ok][order])
    np.testing.assert_array_equal(top.payload["v"], -scores[ok][order])


def test_diagnostics_worst_rows_equal_full_sort(rng) -> None:
    data = make_data(rng)
    n = data["y"].size
    # Duplicate rows give exact ties; the worst rows are planted in the last batch.
    for col in ("a", "b", "g", "u", "y", "w"):
        data[col][200:220] = data[col][180:200]
    data["a"][-1] = 12.0
    data["y"][-2] += 300.0
    x = design(data)
    fit = fit_of(x, data["y"], None)
    config = config_for(fit, data, x, top_k=10)
    batches = [batch_of(data, x, None, lo, hi) for lo, hi in [(0, 60), (60, 190), (190, n)]]
    diag = run(fit, config, batches).finalize()
    rds = [row_diagnostics(fit, b) for b in batches]
    values = {
        field: np.concatenate([getattr(rd, field) for rd in rds])
        for field in ("rows", "weighted_resid", "studentized", "leverage", "cooks")
    }
    scores = {
        "abs_resid": np.abs(values["weighted_resid"]),
        "studentized": np.abs(values["studentized"]),
        "leverage": values["leverage"],
        "cooks": values["cooks"],
    }
    for criterion in CRITERIA:
        s = scores[criterion]
        order = np.lexsort((values["rows"], -s))[:10]  # numpy lexsort as oracle
        assert [r.row for r in diag.worst[criterion]] == values["rows"][order].tolist()
    assert diag.worst["leverage"][0].row == n - 1
    assert diag.worst["abs_resid"][0].row == n - 2


# --------------------------------------------------------------------------- segments


def segment_oracle(labels: pl.Series, e: np.ndarray) -> dict[str, tuple[int, float, float]]:
    """polars group_by: level -> (n, mean, t)."""
    out = (
        pl.DataFrame({"level": labels, "e": e})
        .group_by("level")
        .agg(pl.len().alias("n"), pl.col("e").mean().alias("m"), pl.col("e").std().alias("sd"))
    )
    return {
        r["level"]: (r["n"], r["m"], r["m"] / (r["sd"] / math.sqrt(r["n"])))
        for r in out.iter_rows(named=True)
    }


def test_diagnostics_segments_match_polars_group_by(case) -> None:
    data, x, w, fit, res = case
    config = config_for(fit, data, x)
    batches = [batch_of(data, x, w, lo, hi) for lo, hi in [(0, 33), (33, 200), (200, 240)]]
    diag = run(fit, config, batches).finalize()
    e = np.asarray(res.wresid)
    oracle = segment_oracle(pl.Series(data["g"]), e)
    got = {lv.level: lv for lv in diag.segments["g"]}
    assert set(got) == set(oracle)
    for level, (n, mean, t) in oracle.items():
        assert got[level].n == n
        assert got[level].mean_resid == pytest.approx(mean, rel=1e-9)
        assert got[level].t == pytest.approx(t, rel=1e-9)
        assert got[level].rmse == pytest.approx(
            math.sqrt(np.mean(e[data["g"] == level] ** 2)), rel=1e-9
        )
    ts = [abs(lv.t) for lv in diag.segments["g"]]
    assert ts == sorted(ts, reverse=True)

    # Numeric segment: numpy.digitize with the same cut points (left-closed bins) as oracle.
    codes = np.digitize(data["u"], config.segment_cuts["u"], right=False)
    oracle_u = segment_oracle(pl.Series(codes), e)
    got_u = sorted(diag.segments["u"], key=lambda lv: lv.n)
    assert sorted(v[0] for v in oracle_u.values()) == [lv.n for lv in got_u]
    assert sorted(abs(v[2]) for v in oracle_u.values()) == pytest.approx(
        sorted(abs(lv.t) for lv in diag.segments["u"]), rel=1e-9
    )


def test_diagnostics_segments_of_a_model_column_are_zero_and_ordered_by_size(rng) -> None:
    # With `g` coded as dummies in the model, least squares makes every level's residuals
    # sum to zero (statsmodels' residual means per level are rounding noise, checked below):
    # t is 0 for each level, not noise, and levels come by size, then name (polars oracle).
    data = make_data(rng)
    levels = sorted(set(data["g"]))
    dummies = [(data["g"] == level).astype(float) for level in levels[1:]]
    x = np.column_stack([design(data), *dummies])
    acc = QRAccumulator(x.shape[1], has_intercept=True)
    acc.update(x, data["y"])
    fit = acc.finalize([*NAMES, *levels[1:]])
    res = sm.OLS(data["y"], x).fit()
    e = np.asarray(res.resid)
    assert max(abs(e[data["g"] == level].mean()) for level in levels) < 1e-12
    config = default_config(fit, fit.predict(x), {}, ("g",), {"g": pl.Series(data["g"])})
    n = x.shape[0]
    batch = batch_of(data, x, None, 0, n)
    diag = run(fit, config, [batch]).finalize()
    sizes = (
        pl.DataFrame({"g": data["g"]})
        .group_by("g")
        .len()
        .sort(["len", "g"], descending=[True, False])
    )
    assert [lv.level for lv in diag.segments["g"]] == sizes["g"].to_list()
    assert all(lv.t == 0.0 and lv.mean_resid == 0.0 for lv in diag.segments["g"])


def test_diagnostics_segments_pool_levels_past_the_cap(case) -> None:
    data, x, w, fit, res = case
    config = config_for(fit, data, x, max_segment_levels=3)
    batches = [batch_of(data, x, w, lo, hi) for lo, hi in [(0, 120), (120, 240)]]
    diag = run(fit, config, batches).finalize()
    seen = list(dict.fromkeys(data["g"].tolist()))  # order of first appearance
    kept = seen[:3]
    labels = pl.Series([g if g in kept else "(other)" for g in data["g"]])
    oracle = segment_oracle(labels, np.asarray(res.wresid))  # polars group_by
    got = {lv.level: lv for lv in diag.segments["g"]}
    assert set(got) == set(oracle)
    for level, (n, mean, _) in oracle.items():
        assert got[level].n == n
        assert got[level].mean_resid == pytest.approx(mean, rel=1e-9)
    assert diag.segments_capped == ("g",)


def _segment_levels(values: pl.Series, e: np.ndarray, max_levels: int) -> list[tuple]:
    """SegmentResiduals over `values` in two batches, as (level, n, mean, rmse, t) rows."""
    segments = SegmentResiduals("g", None, max_levels)
    half = values.len() // 2
    segments.update(values[:half], e[:half])
    segments.update(values[half:], e[half:])
    return [dataclasses.astuple(level) for level in segments.finalize()]


@pytest.mark.parametrize("max_levels", [50, 3])
def test_segments_of_text_and_of_categorical_ids_agree(rng, max_levels: int) -> None:
    # A Categorical column maps rows to levels through its ids; text goes through the same
    # path after a cast. Both must give the same levels and numbers, also when this process
    # has coded so many other texts that the ids lie far apart (the sorted look-up), with
    # nulls as their own level. Oracle for the counts and means: polars group_by.
    n = 3_000
    names = np.array(["north", "south", "east", "west", "centre", "coast", "hills"])
    shares = np.array([0.35, 0.25, 0.15, 0.1, 0.08, 0.05, 0.02])
    text = pl.Series("g", rng.choice(names, n, p=shares)).scatter(
        rng.choice(n, 60, replace=False), None
    )
    e = rng.standard_t(5, n)
    as_text = _segment_levels(text, e, max_levels)
    coded = text.cast(pl.Categorical)
    assert _segment_levels(coded, e, max_levels) == as_text
    # Polars frees ids no series holds, so the coded series stay referenced from here on.
    others = pl.Series([f"person-{i}" for i in range(70_000)], dtype=pl.Categorical)
    spread = pl.concat([others[-1:], coded])
    ids = spread.to_physical()
    assert ids.max() - ids.min() > 65_536  # the setup holds: ids too far apart for a table
    spread_e = np.concatenate(([0.0], e))
    far = _segment_levels(spread, spread_e, max_levels + 1)
    assert far == _segment_levels(spread.cast(pl.String), spread_e, max_levels + 1)
    seen = list(dict.fromkeys(text.fill_null(MISSING_LEVEL).to_list()))
    kept = seen[:max_levels]
    labels = text.fill_null(MISSING_LEVEL).map_elements(
        lambda g: g if g in kept else OTHER_LEVEL, return_dtype=pl.String
    )
    oracle = segment_oracle(labels, e)
    assert {row[0] for row in as_text} == set(oracle)
    for level, count, mean, _, _ in as_text:
        assert count == oracle[level][0]
        assert mean == pytest.approx(oracle[level][1], rel=1e-9, abs=1e-12)


def test_pool_values_equals_pooling_each_value_as_a_part(rng) -> None:
    # Oracle for the numbers: numpy's per-group mean and sum of squared deviations of the
    # old and new values together; and `pool_groups` with each value a part of count 1,
    # which it must equal bit for bit (the segments' results do not change with the path).
    old_values = rng.normal(3.0, 2.0, 500)
    old_groups = rng.integers(0, 4, 500)
    count, mean, m2 = pool_groups(old_groups, np.ones(500), old_values, np.zeros(500), 4)
    values = rng.normal(3.0, 2.0, 800)
    groups = rng.integers(0, 6, 800)
    pooled = pool_values(groups, values, count, mean, m2, 6)
    index = np.concatenate((np.arange(6), groups))
    padded = [np.concatenate((part, np.zeros(2))) for part in (count, mean, m2)]
    as_parts = pool_groups(index, np.concatenate((padded[0], np.ones(800))),
                           np.concatenate((padded[1], values)),
                           np.concatenate((padded[2], np.zeros(800))), 6)  # fmt: skip
    for got, want in zip(pooled, as_parts, strict=True):
        assert np.array_equal(got, want)
    every = np.concatenate((old_values, values))
    group = np.concatenate((old_groups, groups))
    for g in range(6):
        v = every[group == g]
        assert pooled[0][g] == v.size
        assert pooled[1][g] == pytest.approx(v.mean(), rel=1e-12)
        assert pooled[2][g] == pytest.approx(((v - v.mean()) ** 2).sum(), rel=1e-10)


# --------------------------------------------------------------------------- flags and config


def test_diagnostics_flags_follow_the_tests(case) -> None:
    data, x, w, fit, res = case
    config = config_for(fit, data, x)
    diag = run(fit, config, [batch_of(data, x, w, 0, 240)]).finalize()
    codes = {f.code for f in diag.flags}
    # statsmodels as oracle for the p-values that decide the flags.
    bp_p = het_breuschpagan(res.wresid, res.model.exog, robust=True)[1]
    jb_p = jarque_bera(res.wresid)[1]
    assert ("spread-changes" in codes) == (bp_p < 0.01)
    assert ("tails" in codes) == (jb_p < 0.01)
    sw = np.ones_like(data["y"]) if w is None else np.sqrt(w)
    infl_ext = OLSInfluence(
        sm.OLS(sw * data["y"], sw[:, None] * x).fit()
    ).resid_studentized_external
    n_big = int(np.sum(np.abs(infl_ext) > 3.0))  # common practice threshold
    assert diag.counts.studentized == n_big
    # Bonferroni bound from scipy's t quantile; the flag fires on a row beyond it, or on
    # more rows beyond ±3 than chance gives (Poisson upper tail from scipy, below 0.01).
    n, df = len(infl_ext), fit.df_resid - 1
    bound = stats.t.ppf(1 - 0.05 / (2 * n), df)
    assert diag.counts.extreme_threshold == pytest.approx(bound, rel=1e-9)
    n_extreme = int(np.sum(np.abs(infl_ext) > bound))
    assert diag.counts.extreme == n_extreme
    expected = n * 2 * stats.norm.sf(3.0)
    excess = stats.poisson.sf(n_big - 1, expected) < 0.01
    assert ("large-studentized" in codes) == (n_extreme > 0 or excess)
    assert "serial-correlation" not in codes  # rows not declared ordered
    for flag in diag.flags:
        assert "may" in flag_message(flag)


def test_diagnostics_studentized_quantiles_match_statsmodels(case) -> None:
    """Oracle: numpy quantiles of statsmodels' externally studentized residuals (grid 0.01)."""
    data, x, w, fit, _ = case
    diag = run(fit, config_for(fit, data, x), [batch_of(data, x, w, 0, 240)]).finalize()
    sw = np.ones_like(data["y"]) if w is None else np.sqrt(w)
    external = OLSInfluence(
        sm.OLS(sw * data["y"], sw[:, None] * x).fit()
    ).resid_studentized_external
    for p, value in diag.studentized_quantiles.items():
        assert value == pytest.approx(np.quantile(external, p), abs=0.02)
    assert len(diag.studentized_quantiles) == 27


@pytest.mark.parametrize(("count", "mean"), [(0, 3.0), (1, 0.2), (40, 267.4), (300, 267.4)])
def test_poisson_upper_tail_matches_scipy(count: int, mean: float) -> None:
    # scipy.stats.poisson.sf(k - 1, mu) = P(X >= k) as oracle
    expected = 1.0 if count == 0 else stats.poisson.sf(count - 1, mean)
    assert poisson_at_least(count, mean) == pytest.approx(expected, rel=1e-9, abs=1e-300)


def test_large_studentized_flag_is_silent_below_chance_and_counts_in_words(rng) -> None:
    """Normal errors: nothing unusual, no flag. One gross error: "1 row", not "1 rows"."""
    n = 3_000
    a, b = rng.uniform(0, 10, n), rng.normal(10.0, 2.0, n)
    y = 1.0 + 0.5 * a - 0.2 * b + rng.normal(0, 1, n)
    data = {"y": y, "a": a, "b": b, "g": rng.choice(np.array(["x", "z"]), n), "u": a}
    x = design(data)
    clean = fit_of(x, y, None)
    diag = run(clean, config_for(clean, data, x), [batch_of(data, x, None, 0, n)]).finalize()
    beyond_3 = diag.counts.studentized  # chance alone gives about 8 of 3,000 beyond ±3
    assert diag.counts.extreme == 0
    assert "large-studentized" not in {f.code for f in diag.flags}, beyond_3
    y = y.copy()
    y[17] += 40.0
    data["y"] = y
    gross = fit_of(x, y, None)
    diag = run(gross, config_for(gross, data, x), [batch_of(data, x, None, 0, n)]).finalize()
    message = next(flag_message(f) for f in diag.flags if f.code == "large-studentized")
    assert "1 row beyond" in message and "1 rows" not in message


def test_default_config_edges_follow_sample_quantiles(rng) -> None:
    data = make_data(rng)
    x = design(data)
    fit = fit_of(x, data["y"], None)
    config = config_for(fit, data, x)
    sample_a = data["a"][:150]
    # numpy.quantile as oracle for the bin edges
    np.testing.assert_allclose(
        config.binned_edges["a"], np.quantile(sample_a, np.linspace(0, 1, 21))
    )
    assert config.hist_edges[-1] == pytest.approx(4.0 * fit.resid_sd)
    assert "g" not in config.segment_cuts  # text column: level by level
    assert config.segment_cuts["u"].size == 9  # numeric: ten bins, nine interior cuts
    # a 0/1 column gets one bin per value
    np.testing.assert_array_equal(
        quantile_edges(np.array([0, 1, 1, 0, 1.0]), 20, name="d"), [0, 0.5, 1]
    )
    with pytest.raises(SpecError, match="segment column `zone`"):
        default_config(fit, fit.predict(x), {}, ("zone",), {})


def test_edge_sample_thinned_first_gives_the_same_edges() -> None:
    # A long sample with gaps (NaN) and a heavy tail: thinning it before `quantile_edges`
    # (as pass 2 does, to keep less of the learning sample) must not move an edge.
    rng = np.random.default_rng(11)
    values = rng.lognormal(1.0, 0.8, 400_003)
    values[rng.random(values.size) < 0.02] = np.nan
    thinned = edge_sample(values)
    assert thinned.size <= EDGE_SAMPLE_VALUES
    assert np.isfinite(thinned).all()
    np.testing.assert_array_equal(edge_sample(thinned), thinned)
    np.testing.assert_array_equal(
        quantile_edges(thinned, 20, name="v"), quantile_edges(values, 20, name="v")
    )
    # numpy.quantile over every finite value as oracle: the thinned edges stay close
    finite = values[np.isfinite(values)]
    np.testing.assert_allclose(
        quantile_edges(thinned, 20, name="v")[1:-1],
        np.quantile(finite, np.linspace(0, 1, 21))[1:-1],
        rtol=0.05,
    )


def test_reset_from_the_fit_hands_over_when_the_added_columns_lie_in_the_design() -> None:
    # Fitted values on two levels only: their square and cube are in the span of the
    # intercept and the 0/1 column, so RESET has nothing to test. From the fit that cannot be
    # told from rounding, so it raises UncertifiedGram; factored from its own rows (what the
    # engine runs then) the added columns are aliased and the test is NaN. numpy's
    # matrix_rank as oracle for the aliasing: the augmented design's rank stays 2.
    rng = np.random.default_rng(8)
    n = 400
    group = (rng.random(n) < 0.3).astype(float)
    x = np.column_stack([np.ones(n), group])
    y = 2.0 + 3.0 * group + rng.normal(size=n)
    fit = QRAccumulator(2, has_intercept=True)
    fit.update(x, y)
    lin = fit.finalize(("intercept", "group"))
    fitted = lin.predict(x)
    assert np.linalg.matrix_rank(np.column_stack([x, fitted**2, fitted**3])) == 2
    frame = pl.DataFrame({"__row": np.arange(n)})
    batch = DesignBatch(x, y, None, np.arange(n, dtype=np.int64), frame, 0, 0, 0)
    config = default_config(lin, fitted, {})
    acc = DiagnosticsAccumulator(lin, config)
    acc.update(batch)
    with pytest.raises(UncertifiedGram):
        acc.finalize()
    exact = DiagnosticsAccumulator(lin, dataclasses.replace(config, exact_tests=True))
    exact.update(batch)
    diagnostics = exact.finalize()
    assert math.isnan(diagnostics.tests["reset"].statistic)
    # Breusch–Pagan still comes out, against statsmodels
    lm = het_breuschpagan(y - fitted, x, robust=True)[0]
    assert diagnostics.tests["breusch_pagan"].statistic == pytest.approx(lm, rel=RTOL)


def test_stream_moments_merge_matches_scipy() -> None:
    rng = np.random.default_rng(3)
    v = 1e6 + rng.gamma(2.0, 3.0, 1000)  # skewed, with a large offset
    acc = StreamMoments()
    for lo, hi in [(0, 1), (1, 10), (10, 600), (600, 1000)]:
        part = StreamMoments()
        part.update(v[lo:hi])
        acc.merge(part)
    # scipy.stats.skew / kurtosis (biased, Pearson) as oracle
    assert acc.skewness() == pytest.approx(stats.skew(v), rel=1e-9)
    assert acc.kurtosis() == pytest.approx(stats.kurtosis(v, fisher=True) + 3.0, rel=1e-9)
    assert acc.mean == pytest.approx(v.mean(), rel=1e-15)


def test_diagnostics_ordered_rows_flag_serial_correlation_and_trend() -> None:
    rng = np.random.default_rng(8)
    n = 200
    t = np.arange(n, dtype=float)
    a = t / 10.0 + rng.normal(0.0, 0.3, n)
    noise = np.cumsum(rng.normal(0.0, 0.3, n))  # a random walk: strongly correlated neighbours
    y = 2.0 + 0.8 * t / 10.0 + noise
    data = {
        "a": a,
        "b": rng.normal(size=n),
        "g": np.array(["x"] * n),
        "u": t,
        "y": y,
        "w": np.ones(n),
    }
    x = design(data)
    fit = fit_of(x, y, None)
    res = sm.OLS(y, x).fit()
    dw = durbin_watson(res.resid)  # statsmodels as oracle
    for is_ordered in (False, True):
        config = config_for(fit, data, x, is_ordered=is_ordered)
        diag = run(fit, config, [batch_of(data, x, None, 0, 120), batch_of(data, x, None, 120, n)])
        codes = {f.code for f in diag.finalize().flags}
        # common practice range 1.5-2.5; only judged when rows are declared ordered
        assert ("serial-correlation" in codes) == (is_ordered and not 1.5 <= dw <= 2.5)
        assert ("shared-trend" in codes) == (is_ordered and res.rsquared > 0.95)
    assert dw < 1.5  # the random walk noise must actually trip the rule


@pytest.mark.parametrize("n_edges", [2, 3, 21, 200])
def test_bin_lookup_equals_searchsorted_bins(rng: np.random.Generator, n_edges: int) -> None:
    # numpy.searchsorted (through bin_index) as oracle, on values that sit exactly on edges,
    # outside the range, and edges crowded into one end (many edges per lookup cell).
    from triage.core.binning import BinLookup, bin_index

    raw = np.concatenate([rng.lognormal(size=5_000), rng.normal(size=5_000) * 1e-6])
    edges = np.unique(np.quantile(raw, np.linspace(0, 1, n_edges)))
    values = np.concatenate([raw, edges, edges + 1e-15, [-1e9, 1e9], rng.normal(size=3_000)])
    values = np.concatenate([values, [np.nan, np.inf, -np.inf]])
    np.testing.assert_array_equal(BinLookup(edges).index(values), bin_index(edges, values))
    constant = np.array([2.0, 2.0])
    np.testing.assert_array_equal(BinLookup(constant).index(values), bin_index(constant, values))
    # the values found exactly hold every value outside the edges and every non-finite one,
    # so the extremes of those are the extremes of all the values outside the edges
    for grid in (edges, constant):
        lookup = BinLookup(grid)
        bins, exact = lookup.index_and_exact(values)
        np.testing.assert_array_equal(bins, bin_index(grid, values))
        outside = ~((values >= grid[0]) & (values <= grid[-1]))
        assert set(np.flatnonzero(outside)) <= set(exact)
        # with a stride, the same bins times it (and the same exact ones), twice over
        for _ in range(2):
            strided, strided_exact = lookup.index_and_exact(values, stride=403)
            np.testing.assert_array_equal(strided, bin_index(grid, values) * 403)
            np.testing.assert_array_equal(strided_exact, exact)
    # Fine-grid cells with tails: numpy.searchsorted (side "right"), a value on the last
    # edge counted in the last bin.
    for grid in (edges, np.linspace(-3.0, 3.0, n_edges), constant):
        expected = np.searchsorted(grid, values, side="right")
        expected[values == grid[-1]] = grid.size - 1
        np.testing.assert_array_equal(BinLookup(grid).fine(values), expected)
