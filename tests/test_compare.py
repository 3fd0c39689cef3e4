"""Model comparison: criteria, nested F tests, held-out scoring in a pass, the CLI's JSON."""

from __future__ import annotations

import io
import json
import math
from contextlib import redirect_stdout

import numpy as np
import polars as pl
import pytest

from triage._typing import ALL_ROWS
from triage.core.compare import NO_DF_NOTE, best_marks, is_nested, nested_f_test
from triage.core.holdout import HoldoutRule, random_holdout_mask
from triage.core.lsq import QRAccumulator
from triage.core.spec import build_spec
from triage.data.base import random_keys
from triage.data.source import open_source
from triage.engine import passes
from triage.engine.compare import HOLDOUT_SALT, compare_models


def _spec(source, terms, **kw):
    return build_spec(
        source.schema(),
        target="y",
        terms=terms,
        intercept=True,
        weights=kw.get("weights"),
        where=None,
        categorical=(),
        reference={},
        max_levels=50,
        drop_invalid=False,
    )


def _write(tmp_path, frame, name="data.parquet", row_group_size=None):
    path = tmp_path / name
    frame.write_parquet(path, row_group_size=row_group_size)
    return open_source(path)


def _noise_frame(rng, n, n_noise):
    x1 = rng.normal(0, 1, n)
    data = {"x1": x1, "y": 1.0 + 2.0 * x1 + rng.normal(0, 1, n)}
    data |= {f"z{j}": rng.normal(0, 1, n) for j in range(n_noise)}
    return pl.DataFrame(data)


def test_compare_pure_noise_raises_r2_but_not_heldout_or_aic(tmp_path, rng):
    """Textbook fact: R² never falls when a column is added, even pure noise; held-out
    error and AIC/BIC penalise the useless columns (any regression text; from memory)."""
    source = _write(tmp_path, _noise_frame(rng, 400, 25))
    noise = ", ".join(f"z{j}" for j in range(25))
    labels = ["x1", f"x1, {noise}"]
    out = compare_models(
        source,
        [_spec(source, t) for t in labels],
        labels,
        holdout=HoldoutRule(fraction=0.3, seed=1),
    )
    small, big = out.comparison.models
    assert big.r2 > small.r2
    assert big.holdout_r2 < small.holdout_r2
    assert big.holdout_rmse > small.holdout_rmse
    assert out.comparison.best["aic"] == 0
    assert out.comparison.best["bic"] == 0
    assert out.comparison.best["holdout_rmse"] == 0
    assert small.n == big.n == out.data.rows_used
    assert small.n + out.rows_held_out == 400


def test_compare_as_many_parameters_as_rows_leaves_no_df(tmp_path, rng):
    """Textbook fact: with as many parameters as rows the fit interpolates (R² = 1) and no
    residual degrees of freedom are left for standard errors (from memory)."""
    frame = pl.DataFrame({f"x{j}": rng.normal(0, 1, 6) for j in range(5)}).with_columns(
        y=pl.Series(rng.normal(0, 1, 6))
    )
    source = _write(tmp_path, frame)
    labels = ["x0", "x0, x1, x2, x3, x4"]
    out = compare_models(source, [_spec(source, t) for t in labels], labels, folds=2)
    exact = out.comparison.models[1]
    fit = out.models[1].outcome.fit
    assert fit.df_resid == 0
    assert exact.r2 == pytest.approx(1.0, abs=1e-12)
    assert np.all(np.isnan(fit.std_error))
    assert exact.adj_r2 is None and exact.aic is None and exact.bic is None
    assert NO_DF_NOTE in exact.notes
    assert "aic" not in out.comparison.best  # only one model has a defined AIC
    test = out.comparison.nested_f[0]
    assert test.f is None and test.p is None and test.df2 == 0


def test_compare_nested_f_matches_statsmodels(rng):
    import statsmodels.api as sm

    n = 120
    x = np.column_stack([np.ones(n), rng.normal(size=(n, 4))])
    y = x @ np.array([1.0, 0.5, 0.0, 0.2, -0.1]) + rng.normal(size=n)
    names = ["intercept", "a", "b", "c", "d"]

    def fit(cols):
        acc = QRAccumulator(len(cols), has_intercept=True)
        acc.update(x[:, cols], y)
        return acc.finalize([names[c] for c in cols])

    small, large = fit([0, 1]), fit([0, 1, 2, 3, 4])
    test = nested_f_test(small, large, indices=(0, 1))
    # Oracle: statsmodels OLSResults.compare_f_test (returns F, p, df_diff).
    f_sm, p_sm, df_sm = sm.OLS(y, x).fit().compare_f_test(sm.OLS(y, x[:, :2]).fit())
    assert test.f == pytest.approx(f_sm, rel=1e-10)
    assert test.p == pytest.approx(p_sm, rel=1e-8)
    assert test.df1 == df_sm == 3
    assert test.df2 == n - 5


def test_compare_is_nested_needs_a_proper_subset():
    assert is_nested(["intercept", "a"], ["intercept", "a", "b"])
    assert not is_nested(["intercept", "a"], ["intercept", "a"])
    assert not is_nested(["intercept", "a", "c"], ["intercept", "a", "b"])


def test_compare_best_marks_skip_undefined_values(tmp_path, rng):
    source = _write(tmp_path, _noise_frame(rng, 200, 3))
    labels = ["x1", "x1, z0", "z1"]
    out = compare_models(source, [_spec(source, t) for t in labels], labels)
    models = out.comparison.models
    marks = best_marks(models)
    # Oracle: the plain min / max over the values, computed here with Python built-ins.
    assert marks["aic"] == min(range(3), key=lambda i: models[i].aic)
    assert marks["adj_r2"] == max(range(3), key=lambda i: models[i].adj_r2)
    assert "holdout_r2" not in marks  # no held-out rule: no held-out values


def test_compare_fits_every_model_on_the_rows_all_can_use(tmp_path, rng):
    frame = _noise_frame(rng, 300, 2).with_columns(
        pl.when(pl.int_range(300) % 7 == 0).then(None).otherwise(pl.col("z1")).alias("z1")
    )
    source = _write(tmp_path, frame)
    labels = ["x1", "x1, z1"]
    out = compare_models(source, [_spec(source, t) for t in labels], labels)
    # Oracle: rows without a missing value, counted with numpy.
    complete = int(np.sum(np.arange(300) % 7 != 0))
    assert [m.n for m in out.comparison.models] == [complete, complete]
    assert out.data.rows_dropped_missing == 300 - complete
    assert len(out.comparison.nested_f) == 1


@pytest.mark.parametrize("weighted", [False, True])
def test_compare_heldout_in_streamed_pass_equals_numpy(tmp_path, rng, monkeypatch, weighted):
    monkeypatch.setattr(passes, "BATCH_ROWS", 97)  # many small batches in the streamed pass
    n = 1_500
    frame = _noise_frame(rng, n, 1).with_columns(w=pl.Series(rng.uniform(0.5, 2, n)))
    source = _write(tmp_path, frame, row_group_size=250)
    labels = ["x1, z0"]
    spec = _spec(source, labels[0], weights="w" if weighted else None)
    out = compare_models(
        source, [spec], labels, rows=ALL_ROWS, seed=4, holdout=HoldoutRule(fraction=0.25, seed=4)
    )
    held = random_holdout_mask(random_keys(np.arange(n, dtype=np.int64), 4 ^ HOLDOUT_SALT), 0.25)
    x = np.column_stack([np.ones(n), frame["x1"], frame["z0"]])
    y = frame["y"].to_numpy()
    w = frame["w"].to_numpy() if weighted else np.ones(n)
    # Oracle: numpy weighted least squares on the fitted rows, residuals on the held-out ones.
    sw = np.sqrt(w[~held])
    coef = np.linalg.lstsq(x[~held] * sw[:, None], y[~held] * sw, rcond=None)[0]
    resid = y[held] - x[held] @ coef
    sse = np.sum(w[held] * resid**2)
    mean = np.sum(w[held] * y[held]) / np.sum(w[held])
    sst = np.sum(w[held] * (y[held] - mean) ** 2)
    model = out.comparison.models[0]
    np.testing.assert_allclose(out.models[0].outcome.fit.coef, coef, rtol=1e-9)
    assert out.rows_held_out == int(held.sum())
    assert model.holdout_r2 == pytest.approx(1 - sse / sst, rel=1e-9)
    assert model.holdout_rmse == pytest.approx(math.sqrt(sse / np.sum(w[held])), rel=1e-9)


def test_compare_holdout_by_column_holds_out_later_rows(tmp_path, rng):
    frame = _noise_frame(rng, 400, 1).with_columns(t=pl.int_range(400))
    source = _write(tmp_path, frame)
    labels = ["x1"]
    out = compare_models(
        source, [_spec(source, "x1")], labels, holdout=HoldoutRule(column="t", cut="300")
    )
    assert out.rows_held_out == 100
    assert out.comparison.models[0].n == 300
    # Oracle: numpy least squares on the first 300 rows.
    x = np.column_stack([np.ones(400), frame["x1"]])
    coef = np.linalg.lstsq(x[:300], frame["y"][:300].to_numpy(), rcond=None)[0]
    np.testing.assert_allclose(out.models[0].outcome.fit.coef, coef, rtol=1e-10)


def test_compare_cli_json_has_the_documented_shape(tmp_path, rng):
    from triage.cli.main import main

    source_path = tmp_path / "d.parquet"
    _noise_frame(rng, 300, 2).write_parquet(source_path)
    argv = [
        "compare",
        str(source_path),
        "--target",
        "y",
        "--terms",
        "x1",
        "--terms",
        "x1, z0, z1",
        "--holdout",
        "0.2",
        "--json",
    ]
    buffer = io.StringIO()
    with redirect_stdout(buffer):
        assert main(argv) == 0
    document = json.loads(buffer.getvalue())
    assert [m["terms"] for m in document["models"]] == ["x1", "x1, z0, z1"]
    keys = {"terms", "n", "r2", "adj_r2", "aic", "bic", "holdout_r2", "holdout_rmse"}
    assert all(keys <= set(m) for m in document["models"])
    (test,) = document["nested_f"]
    assert test["smaller"] == "x1" and test["larger"] == "x1, z0, z1"
    assert set(test) == {"smaller", "larger", "f", "df1", "df2", "p"}
    # Oracle: the same comparison run through the engine directly.
    source = open_source(source_path)
    out = compare_models(
        source,
        [_spec(source, "x1"), _spec(source, "x1, z0, z1")],
        ["x1", "x1, z0, z1"],
        holdout=HoldoutRule(fraction=0.2, seed=0),
    )
    assert document["models"][1]["holdout_r2"] == pytest.approx(
        out.comparison.models[1].holdout_r2, rel=1e-12
    )
    assert document["models"][0]["n"] + out.rows_held_out == 300


def test_compare_cli_text_marks_best_values(tmp_path, rng):
    from triage.cli.main import main
    from triage.views.compare import BEST_MARK

    source_path = tmp_path / "d.parquet"
    _noise_frame(rng, 200, 1).write_parquet(source_path)
    buffer = io.StringIO()
    with redirect_stdout(buffer):
        code = main(["compare", str(source_path), "-y", "y", "-x", "x1", "-x", "x1, z0"])
    assert code == 0
    text = buffer.getvalue()
    assert text.count(BEST_MARK) >= 4  # adj. R², AIC, BIC, K-fold RMSE, plus the legend
    assert "Residual standard error" not in text
