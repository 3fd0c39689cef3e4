"""Fitting several models on the same rows in one pass, with held-out scoring and sample checks.

`compare_models` streams the rows once (a sample, or every row) and, for each batch, keeps
only the rows every model can use, so in-sample criteria and nested F tests compare like
with like. Held-out rows (`HoldoutRule`) go to a `HoldoutAccumulator` per model in the same
pass and are scored with the final coefficients afterwards. K-fold RMSE, the robust refit
and the curvature check run on the in-memory sample.
"""

from __future__ import annotations

import threading
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Final

import numpy as np
import polars as pl

from triage.core.checks import curvature_check, huber_refit
from triage.core.compare import compare_fits
from triage.core.design import DesignBatch, DesignBudget, DesignBuilder
from triage.core.holdout import (
    HoldoutAccumulator,
    HoldoutRule,
    cut_holdout_mask,
    kfold_rmse,
    random_holdout_mask,
)
from triage.core.indicator_terms import count_indicator_rows, indicator_parts
from triage.core.limits import check_factor_scale
from triage.core.lsq import QRAccumulator
from triage.data.base import random_keys
from triage.data.source import ROW_INDEX
from triage.engine.passes import (
    DEFAULT_SAMPLE_ROWS,
    PassPlan,
    RowCounts,
    check_rows_left,
    dense_pieces,
    naming_values_too_large,
)
from triage.engine.progress import ProgressCallback, ProgressTracker
from triage.errors import SpecError
from triage.results.checks import CurvatureCheck, RobustCheck
from triage.results.compare import ComparedModel, ComparisonOutcome
from triage.results.fit import FitOutcome
from triage.results.holdout import KFoldResult

if TYPE_CHECKING:
    from triage._typing import RowsToRead, Sampling
    from triage.core.indicator_terms import IndicatorLevel
    from triage.core.levels import LevelTable
    from triage.core.spec import ModelSpec
    from triage.data.source import Source
    from triage.engine.passes import PassEngine

__all__ = [
    "compare_models",
    "curvature_check_outcome",
    "robust_check_outcome",
]

HOLDOUT_SALT: Final = 0x6A09E667F3BCC908
"""Mixed into the seed of the held-out keys so they differ from the sample's keys.

A uniform sample keeps the rows with the smallest `random_keys` under the user's seed;
with the same keys the sample would be exactly the held-out rows. (The constant is the
fractional part of sqrt(2) in hex, a number with no structure of its own.)
"""


def _check_same_rows_spec(specs: Sequence[ModelSpec]) -> None:
    first = specs[0]
    for spec in specs[1:]:
        for field, a, b in (
            ("target", first.target_label, spec.target_label),
            ("weights", first.weights, spec.weights),
            ("filter", first.where, spec.where),
        ):
            if a != b:
                msg = (
                    f"models compared must share the {field}: got `{a}` and `{b}`; "
                    "give the same target, `--weights` and `--where` for every `--terms`"
                )
                raise SpecError(msg)


def _holdout_positions(
    frame: pl.DataFrame, rule: HoldoutRule | None
) -> tuple[np.ndarray, pl.DataFrame, int]:
    """Return held-out positions of `frame`, the frame without unassigned rows, and their count."""
    positions = frame[ROW_INDEX].cast(pl.Int64).to_numpy()
    if rule is None:
        return np.empty(0, dtype=np.int64), frame, 0
    if rule.column is None:
        assert rule.fraction is not None  # HoldoutRule checks exactly one is set
        keys = random_keys(positions, rule.seed ^ HOLDOUT_SALT)
        return positions[random_holdout_mask(keys, rule.fraction)], frame, 0
    held, known = cut_holdout_mask(frame[rule.column], rule.cut)
    n_unknown = int((~known).sum())
    kept = frame.filter(pl.Series(known)) if n_unknown else frame
    return positions[held & known], kept, n_unknown


def _common_batches(
    builders: Sequence[DesignBuilder], frame: pl.DataFrame, counts: RowCounts | None
) -> list[DesignBatch]:
    """Build every model on the rows all of them can use; count the others once each."""
    for builder in builders:
        batch = builder.build(frame)
        if counts is not None:
            counts.missing += batch.n_dropped_missing
            counts.domain += batch.n_dropped_domain
            counts.unseen += batch.n_dropped_unseen_level
        frame = batch.frame
    return [builder.build(frame) for builder in builders]


def _learn_builders(
    specs: Sequence[ModelSpec],
    source: Source,
    frame: pl.DataFrame,
    *,
    level_tables: Mapping[str, LevelTable] | None = None,
    indicator_levels: Mapping[str, IndicatorLevel] | None = None,
    budget: DesignBudget | None = None,
) -> tuple[list[DesignBuilder], pl.DataFrame]:
    """Learn each model's coding on the sample rows every model can use; return those rows too.

    Learning on the same rows gives every model the same levels and `std()` scaling, so
    rebuilding a model's rows later reproduces what was fitted. A full pass gives the
    levels it counted over every row (`level_tables`, `indicator_levels`) and its memory
    `budget`; a sample's indicator levels are counted on every row read, so a level held
    only by rows some model cannot use still counts as held.
    """
    schema = source.schema()
    if indicator_levels is None:
        indicator_levels = count_indicator_rows(schema, indicator_parts(specs), frame)

    def learn(spec: ModelSpec, rows: pl.DataFrame) -> DesignBuilder:
        return DesignBuilder.learn(
            spec,
            schema,
            rows,
            level_tables=level_tables,
            indicator_levels=indicator_levels,
            budget=budget,
        )

    provisional = [learn(spec, frame) for spec in specs]
    common = _common_batches(provisional, frame, None)[0].frame
    return [learn(spec, common) for spec in specs], common


def compare_models(
    source: Source,
    specs: Sequence[ModelSpec],
    labels: Sequence[str],
    *,
    rows: RowsToRead = DEFAULT_SAMPLE_ROWS,
    seed: int = 0,
    sampling: Sampling = "groups",
    holdout: HoldoutRule | None = None,
    folds: int = 5,
    exclude_rows: Collection[int] = (),
    on_progress: ProgressCallback | None = None,
    cancel: threading.Event | None = None,
    engine: PassEngine | None = None,
) -> ComparisonOutcome:
    """Fit several models to the same rows in one pass and compare them.

    Parameters
    ----------
    source : Source
        Where the rows come from.
    specs : sequence of ModelSpec
        The models; they must share target, weights and filter.
    labels : sequence of str
        Each model's terms as written, for the table.
    rows : int or ALL_ROWS, default=200_000
        Sample size; `ALL_ROWS` streams every row.
    seed : int, default=0
        Seed of the sample, of the held-out split and of the fold assignment.
    sampling : {"groups", "uniform"}, default="groups"
        How the sample is drawn.
    holdout : HoldoutRule, optional
        Rows to hold out of every fit and score afterwards; with it, in-sample figures
        (R², AIC, BIC, n) describe the rows not held out.
    folds : int, default=5
        Folds of the K-fold RMSE on the sample (rows not held out).
    exclude_rows : collection of int
        Source positions to leave out (the file is never changed).
    on_progress, cancel
        Progress callback and cancel event; see `ProgressTracker`.
    engine : PassEngine, optional
        Runs a pass over every row on a cluster; a sample is always read here.

    Returns
    -------
    ComparisonOutcome

    Raises
    ------
    SpecError
        If the models differ in target, weights or filter, or the held-out column is unknown.
    DataError
        If no rows are left to fit.
    PassCancelled
        When `cancel` is set; within one batch.
    """
    if not specs or len(specs) != len(labels):
        msg = f"give one label per model: got {len(specs)} models and {len(labels)} labels"
        raise SpecError(msg)
    _check_same_rows_spec(specs)
    extra = [c for spec in specs[1:] for c in spec.source_columns()]
    if holdout is not None and holdout.column is not None:
        if holdout.column not in source.schema():
            msg = f"unknown column `{holdout.column}` in `--holdout-by`; see the source's columns"
            raise SpecError(msg)
        extra.append(holdout.column)
    plan = PassPlan.read(
        source,
        specs[0],
        rows=rows,
        seed=seed,
        sampling=sampling,
        exclude_rows=exclude_rows,
        extra_columns=list(dict.fromkeys(extra)),
        engine=engine,
    )
    budget = plan.budget()
    tables = plan.count_levels(
        ProgressTracker(None, cancel=cancel),
        min(min(s.max_levels for s in specs), budget.max_columns()),
        specs,
    )
    builders, common_sample = _learn_builders(
        specs,
        source,
        plan.learning_frame,
        level_tables=tables,
        indicator_levels=plan.count_indicator_rows(ProgressTracker(None, cancel=cancel), specs),
        budget=budget,
    )

    def new_part() -> _ComparePart:
        return _ComparePart.empty(builders)

    widest = max(builders, key=lambda builder: len(builder.column_names))

    def fold(part: _ComparePart, frame: pl.DataFrame) -> None:
        for piece in dense_pieces(widest, frame):
            part.update(builders, piece, holdout)

    counts = RowCounts()
    tracker = ProgressTracker(plan.rows_total(), on_progress=on_progress, cancel=cancel)
    folded = plan.fold_frames(new_part, fold, _ComparePart.merge, counts, tracker)
    counts.absorb(folded.counts)
    accumulators, scorers = folded.fits, folded.scorers
    n_held, n_unknown = folded.n_held, folded.n_unknown
    check_rows_left(counts, specs[0])
    summary = plan.summary(counts)
    for builder, accumulator in zip(builders, accumulators, strict=True):
        check_factor_scale(accumulator.factor, builder.column_names, builder.spec.target_label)
    cvs = _sample_kfold(builders, common_sample, holdout, exclude_rows, folds, seed)
    models = []
    for label, builder, accumulator, scorer, cv in zip(
        labels, builders, accumulators, scorers, cvs, strict=True
    ):
        fit = accumulator.finalize(builder.column_names)
        outcome = FitOutcome(builder.spec, builder, fit, summary, common_sample)
        score = scorer.score(fit.coef) if holdout is not None else None
        models.append(ComparedModel(label, outcome, score, cv))
    comparison = compare_fits(
        labels,
        [m.outcome.fit for m in models],
        holdouts=[m.holdout for m in models],
        cv_rmse=[None if m.cv is None else m.cv.rmse for m in models],
    )
    return ComparisonOutcome(tuple(models), comparison, summary, holdout, n_held, n_unknown, folds)


@dataclass
class _ComparePart:
    """What one part of a comparison pass gathers: each model's fit and held-out scorer."""

    fits: list[QRAccumulator]
    scorers: list[HoldoutAccumulator]
    counts: RowCounts
    """Rows dropped by the models (missing, domain, unseen levels) and rows fitted."""
    n_held: int = 0
    n_unknown: int = 0

    @classmethod
    def empty(cls, builders: Sequence[DesignBuilder]) -> _ComparePart:
        """Start a part with nothing gathered."""
        return cls(
            [QRAccumulator(len(b.column_names), has_intercept=b.spec.intercept) for b in builders],
            [HoldoutAccumulator(len(b.column_names)) for b in builders],
            RowCounts(),
        )

    def update(
        self, builders: Sequence[DesignBuilder], frame: pl.DataFrame, holdout: HoldoutRule | None
    ) -> None:
        """Add a frame: rows every model can use go to the fits, held-out rows to the scorers."""
        held_positions, frame, unknown = _holdout_positions(frame, holdout)
        self.n_unknown += unknown
        batches = _common_batches(builders, frame, self.counts)
        is_held = np.isin(batches[0].rows, held_positions)
        self.n_held += int(is_held.sum())
        self.counts.used += int((~is_held).sum())
        for builder, batch, accumulator, scorer in zip(
            builders, batches, self.fits, self.scorers, strict=True
        ):
            with naming_values_too_large(builder, frame):
                _split_update(batch, is_held, accumulator, scorer)

    def merge(self, other: _ComparePart) -> _ComparePart:
        """Add what another part gathered (its rows come later in the source)."""
        for fit, scorer, other_fit, other_scorer in zip(
            self.fits, self.scorers, other.fits, other.scorers, strict=True
        ):
            fit.merge(other_fit)
            scorer.merge(other_scorer)
        self.counts.absorb(other.counts)
        self.n_held += other.n_held
        self.n_unknown += other.n_unknown
        return self


def _split_update(
    batch: DesignBatch, is_held: np.ndarray, fit: QRAccumulator, scorer: HoldoutAccumulator
) -> None:
    """Send a batch's fitted rows to the fit and its held-out rows to the scorer."""
    w = batch.weights
    train = ~is_held
    if train.any():
        fit.update(batch.x[train], batch.y[train], None if w is None else w[train])
    if is_held.any():
        scorer.update(batch.x[is_held], batch.y[is_held], None if w is None else w[is_held])


def _sample_rows(
    frame: pl.DataFrame, holdout: HoldoutRule | None, exclude_rows: Collection[int]
) -> pl.DataFrame:
    """Return the sample rows that are neither held out nor excluded by the user."""
    held, frame, _ = _holdout_positions(frame, holdout)
    drop = np.union1d(held, np.fromiter(exclude_rows, dtype=np.int64))
    if drop.size == 0:
        return frame
    return frame.filter(~pl.col(ROW_INDEX).is_in(pl.Series(drop).implode()))


def _sample_kfold(
    builders: Sequence[DesignBuilder],
    frame: pl.DataFrame,
    holdout: HoldoutRule | None,
    exclude_rows: Collection[int],
    folds: int,
    seed: int,
) -> list[KFoldResult | None]:
    batches = _common_batches(builders, _sample_rows(frame, holdout, exclude_rows), None)
    return [
        kfold_rmse(
            b.x, b.y, b.weights, has_intercept=builder.spec.intercept, folds=folds, seed=seed
        )
        for b, builder in zip(batches, builders, strict=True)
    ]


def _sample_batch(
    outcome: FitOutcome, holdout: HoldoutRule | None, exclude_rows: Collection[int]
) -> DesignBatch:
    frame = _sample_rows(outcome.sample, holdout, exclude_rows)
    return outcome.builder.build(frame.select([*outcome.spec.source_columns(), ROW_INDEX]))


def robust_check_outcome(
    outcome: FitOutcome,
    *,
    holdout: HoldoutRule | None = None,
    exclude_rows: Collection[int] = (),
) -> RobustCheck:
    """Refit a model on its in-memory sample with Huber's M-estimator, beside least squares.

    Parameters
    ----------
    outcome : FitOutcome
        A fit (quick or full); its sample rows are refitted.
    holdout : HoldoutRule, optional
        Leave the held-out rows out, as the fit did.
    exclude_rows : collection of int
        Source positions the user left out.

    Returns
    -------
    RobustCheck
    """
    batch = _sample_batch(outcome, holdout, exclude_rows)
    return huber_refit(
        batch.x,
        batch.y,
        outcome.builder.column_names,
        has_intercept=outcome.spec.intercept,
        weights=batch.weights,
    )


def curvature_check_outcome(
    outcome: FitOutcome,
    *,
    folds: int = 5,
    seed: int = 0,
    holdout: HoldoutRule | None = None,
    exclude_rows: Collection[int] = (),
) -> CurvatureCheck:
    """Check each numeric predictor of a model for a curved effect, on the in-memory sample.

    Parameters
    ----------
    outcome : FitOutcome
        A fit (quick or full).
    folds : int, default=5
        Folds of the K-fold RMSE.
    seed : int, default=0
        Seed of the fold assignment.
    holdout : HoldoutRule, optional
        Leave the held-out rows out, as the fit did.
    exclude_rows : collection of int
        Source positions the user left out.

    Returns
    -------
    CurvatureCheck
        The plain term of a predictor (``distance_km``) is replaced by its spline; its other
        terms (``log(distance_km)``, interactions) stay.
    """
    batch = _sample_batch(outcome, holdout, exclude_rows)
    builder = outcome.builder
    plain = {t.column: t.label for t in outcome.spec.terms if t.kind == "numeric" and t.column}
    linear_columns = {
        column: [j for j, owner in enumerate(builder.term_of_column) if owner == label]
        for column, label in plain.items()
    }
    predictors = {
        column: batch.frame[column].cast(pl.Float64).to_numpy()
        for column in builder.numeric_predictors
    }
    return curvature_check(
        batch.x,
        batch.y,
        batch.weights,
        has_intercept=outcome.spec.intercept,
        predictors=predictors,
        linear_columns=linear_columns,
        folds=folds,
        seed=seed,
    )
