"""Pass 2: residual diagnostics of a finished fit, streamed over design batches and mergeable.

Everything here is computed from the fit of pass 1 and one more pass over the same rows:
per-row values (fitted, residual, leverage, studentized residuals, Cook's distance), a residual
histogram and quantiles, residuals binned by fitted value and by each numeric predictor, exact
worst-row lists, residual summaries per segment, Breusch–Pagan, RESET, Jarque–Bera and
Durbin–Watson, HC0–HC3 standard errors, and plain-word flags.

Weighted fits. Every residual summary (histogram, quantiles, bins, segments, tests, rankings)
uses the weighted residual ``√w·e``, the scale on which the model assumes equal spread; for an
unweighted fit it is the residual itself. Leverage and the studentized residuals are those of
the whitened regression ``√w·y`` on ``√w·X``; the robust covariances use ``√w·x`` rows and
``√w·e``, as statsmodels' WLS results do. Breusch–Pagan regresses ``(√w·e)²`` on the unscaled
design with a constant (the scaled design has no constant column, and an R² without one does
not measure a dependence); RESET refits with the weights.

Flags are aids to judgement: each names its rule, and none is proof of an error.
"""

from __future__ import annotations

import copy
import functools
import math
from typing import TYPE_CHECKING, Any, Final

import numpy as np
import polars as pl
from numpy.typing import NDArray

from triage._typing import CRITERIA, Criterion
from triage.core.binning import (
    BinLookup,
    pack_counts,
    quantiles_from_counts,
    unpack_counts,
)
from triage.core.design import CodedBatch, DesignBatch
from triage.core.flag_rules import (
    COOKS_NUMERATOR,
    LEVERAGE_FACTOR,
    STUDENTIZED_LIMIT,
    bonferroni_bound,
    raise_flags,
)
from triage.core.indicators import GRAM_CHUNK_ROWS, LevelGram, SummedBlock, level_grams
from triage.core.moments import StreamMoments
from triage.core.residual_breakdown import BinnedResiduals, SegmentResiduals
from triage.core.residual_tests import (
    TESTS_FROM_FIT_MAX_CONDITION,
    BreuschPaganAccumulator,
    BreuschPaganFromFit,
    CrossProducts,
    DurbinWatsonAccumulator,
    ResetAccumulator,
    ResetFromFit,
    coded_cross,
    jarque_bera,
    shifted_cross,
)
from triage.core.row_values import (
    LEVERAGE_ONE_TOLERANCE,
    fit_rank,
    fitted_and_leverage,
    row_values,
)
from triage.core.worst_rows import TopRows
from triage.errors import SpecError
from triage.results.diagnostics import (
    Diagnostics,
    ResidualHistogram,
    RobustStdErrors,
    RowDiagnostics,
    ThresholdCounts,
    WorstRow,
)

if TYPE_CHECKING:
    from collections.abc import Sequence

    from triage.core.diagnostics_config import DiagnosticsConfig
    from triage.core.indicators import CodedDesign
    from triage.core.lsq import LinearFit

__all__ = ["DiagnosticsAccumulator"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

RESID_QUANTILES: Final = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)
"""Probabilities of the reported residual quantiles."""

STUDENTIZED_EDGES: Final = np.linspace(-10.0, 10.0, 2001)
"""Fine grid of the studentized residuals (steps of 0.01) behind the normal quantile chart."""
QUANTILE_CHART_PROBS: Final = (
    0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45, 0.5,
    0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95, 0.975, 0.99, 0.995, 0.999,
)  # fmt: skip
"""Probabilities of the studentized-residual quantiles drawn against the normal's."""

_WORST_FIELDS: Final = ("fitted", "resid", "weighted_resid", "studentized", "leverage", "cooks")


@functools.cache
def _studentized_lookup() -> BinLookup:
    """Return the lookup of `STUDENTIZED_EDGES`, made once (kept out of every pickle)."""
    return BinLookup(STUDENTIZED_EDGES)


_PACKED_COUNTS: Final = ("_hist", "_fine", "_studentized")
"""Count arrays of `DiagnosticsAccumulator` pickled with `pack_counts`."""


def _meat_roots(
    weights: FloatArray | None, rd: RowDiagnostics
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Row factors ``|e| sqrt(w ω)`` of the HC0, HC2 and HC3 meats (0 where h is 1)."""
    root = np.abs(rd.weighted_resid)
    if weights is not None:
        root *= np.sqrt(weights)
    one_minus_h = 1.0 - rd.leverage
    ok = one_minus_h > LEVERAGE_ONE_TOLERANCE
    root_hc3 = np.divide(root, one_minus_h, out=np.zeros_like(root), where=ok)
    root_hc2 = np.sqrt(root * root_hc3)  # |e| / sqrt(1 - h), 0 where h is 1
    return root, root_hc2, root_hc3


class DiagnosticsAccumulator:
    """Streaming, mergeable residual diagnostics of a finished fit (pass 2).

    Parameters
    ----------
    fit : LinearFit
        The fit of pass 1.
    config : DiagnosticsConfig
        What to summarise (see `default_config`).

    Notes
    -----
    Batches may come in any order and parts of a pass merge in any order (Durbin–Watson
    joins batches by the source position of their rows). Threshold counts for the
    flags are exact: the thresholds ``2p/n`` and ``4/n`` use the fit's row count, known
    after pass 1.

    Examples
    --------
    Eight rows in two batches; the last lies far off the line of the others.

    >>> import polars as pl
    >>> from triage.core.design import ROW_INDEX, DesignBuilder
    >>> from triage.core.diagnostics_config import default_config
    >>> from triage.core.lsq import QRAccumulator
    >>> from triage.core.spec import build_spec
    >>> frame = pl.DataFrame(
    ...     {"minutes": [12.0, 15, 21, 24, 30, 33, 41, 90], "km": [1.0, 2, 3, 4, 5, 6, 7, 8]}
    ... ).with_row_index(ROW_INDEX)
    >>> spec = build_spec(frame.schema, target="minutes", terms="km")
    >>> builder = DesignBuilder.learn(spec, frame.schema, frame)
    >>> batches = [builder.build(frame[:4]), builder.build(frame[4:])]
    >>> qr = QRAccumulator(2, has_intercept=True)
    >>> for batch in batches:
    ...     qr.update(batch.x, batch.y)
    >>> fit = qr.finalize(builder.column_names)
    >>> config = default_config(fit, fit.predict(builder.build(frame).x), {})
    >>> acc = DiagnosticsAccumulator(fit, config)
    >>> for batch in batches:
    ...     acc.update(batch)
    >>> diagnostics = acc.finalize()
    >>> [(row.row, round(row.resid, 2)) for row in diagnostics.worst["abs_resid"][:2]]
    [(7, 26.83), (6, -13.62)]
    """

    def __init__(
        self, fit: LinearFit, config: DiagnosticsConfig, *, indicators: Sequence[int] = ()
    ) -> None:
        self.fit = fit
        self.config = config
        self._indicators = tuple(indicators)
        p = len(fit.names)
        rank = fit_rank(fit)
        self._n = 0
        self._moments = StreamMoments()
        self._dw = DurbinWatsonAccumulator()
        self._hist = np.zeros(config.hist_edges.size + 1, dtype=np.int64)
        self._fine = np.zeros(config.fine_edges.size + 1, dtype=np.int64)
        self._hist_lookup = BinLookup(config.hist_edges)
        self._fine_lookup = BinLookup(config.fine_edges)
        self._min = math.inf
        self._max = -math.inf
        self._studentized = np.zeros(STUDENTIZED_EDGES.size + 1, dtype=np.int64)
        self._studentized_range = (math.inf, -math.inf)
        self._binned = {
            name: BinnedResiduals(edges, config.fine_edges)
            for name, edges in config.binned_edges.items()
        }
        self._worst = {c: TopRows(config.top_k, _WORST_FIELDS) for c in CRITERIA}
        self._segments = {
            col: SegmentResiduals(col, config.segment_cuts.get(col), config.max_segment_levels)
            for col in config.segment_columns
        }
        from_fit = not config.exact_tests and config.fit_condition <= TESTS_FROM_FIT_MAX_CONDITION
        self._bp: BreuschPaganAccumulator | BreuschPaganFromFit = (
            BreuschPaganFromFit(fit)
            if from_fit and fit.has_intercept and not fit.is_weighted
            else BreuschPaganAccumulator(
                p, has_intercept=fit.has_intercept, unshifted=self._indicators
            )
        )
        center, scale = config.fitted_center, config.fitted_scale
        self._reset: ResetAccumulator | ResetFromFit = (
            ResetFromFit(fit, center=center, scale=scale)
            if from_fit
            else ResetAccumulator(
                p,
                has_intercept=fit.has_intercept,
                center=center,
                scale=scale,
                unshifted=self._indicators,
            )
        )
        self._meat = np.zeros((3, rank, rank))
        # Coded rows' meats as blocks of counts and sums, written out once by `_meats`: a
        # Gram matrix over every indicator per batch cost O(p²) a batch, blocks O(L q).
        self._coded_meat: list[LevelGram] = []
        self._coded_layout: tuple[IntArray, list[IntArray], int] | None = None
        self._leverage_threshold = LEVERAGE_FACTOR * rank / fit.n
        self._cooks_threshold = COOKS_NUMERATOR / fit.n
        self._extreme_threshold = bonferroni_bound(fit.n, fit.df_resid)
        self._n_extreme = 0
        self._n_studentized = 0
        self._n_leverage = 0
        self._n_cooks = 0

    def __getstate__(self) -> dict[str, Any]:
        """Pickle the histograms' counts packed small (`pack_counts`), for a cluster."""
        state = self.__dict__.copy()
        for name in _PACKED_COUNTS:
            state[name] = pack_counts(state[name])
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        """Restore a pickled accumulator, its counts as int64 again."""
        for name in _PACKED_COUNTS:
            state[name] = unpack_counts(state[name])
        self.__dict__.update(state)

    def _check_frame(self, batch: DesignBatch | CodedBatch) -> None:
        """Raise `SpecError` if a binned predictor or segment column is not in the frame."""
        wanted = [c for c in self._binned if c != "fitted"] + list(self._segments)
        missing = [c for c in wanted if c not in batch.frame.columns]
        if missing:
            msg = (
                f"columns `{'`, `'.join(missing)}` are binned or segmented but not in the "
                f"batch's frame (columns: {', '.join(batch.frame.columns)}); read them with "
                "the model's columns"
            )
            raise SpecError(msg)

    def update(self, batch: DesignBatch | CodedBatch) -> None:
        """Add the next batch of design rows (in file order).

        Raises
        ------
        SpecError
            If a binned predictor or segment column is missing from ``batch.frame``.
        """
        if batch.n_rows == 0:
            return
        self._check_frame(batch)
        shifted, fitted, h = fitted_and_leverage(self.fit, batch)
        rd = row_values(self.fit, fitted, h, batch)
        e = rd.weighted_resid
        self._n += e.size
        self._moments.update(e)
        self._dw.update(e, start=int(batch.rows[0]))
        self._hist += np.bincount(self._hist_lookup.fine(e), minlength=self._hist.size)
        cell = self._fine_lookup.fine(e)  # shared by every binned variable
        below = np.flatnonzero(cell == 0)
        above = np.flatnonzero(cell == self._fine.size - 1)
        self._fine += np.bincount(cell, minlength=self._fine.size)
        self._min = min(self._min, float(e.min()))
        self._max = max(self._max, float(e.max()))
        self._add_studentized(rd.studentized)
        for name, binned in self._binned.items():
            x = rd.fitted if name == "fitted" else batch.frame[name].cast(pl.Float64).to_numpy()
            binned.update(x, e, cell, below, above)
        payload = {f: getattr(rd, f) for f in _WORST_FIELDS}
        scores: dict[Criterion, FloatArray] = {
            "abs_resid": np.abs(e),
            "studentized": np.abs(rd.studentized),
            "leverage": rd.leverage,
            "cooks": rd.cooks,
        }
        for criterion, top in self._worst.items():
            top.update(scores[criterion], rd.rows, payload)
        for col, seg in self._segments.items():
            seg.update(batch.frame[col], e)
        if isinstance(batch, CodedBatch):
            # `shifted` holds the coded rows' dense columns minus the fit's shift
            self._update_tests(batch, rd, coded_cross(self.fit, batch.design, shifted))
            dense = [shifted[:, j] for j in range(shifted.shape[1])]
            self._update_coded_sums(batch.design, dense, batch.weights, rd)
        else:
            self._update_tests(batch, rd, shifted_cross(shifted))
            self._update_meat(shifted, batch.weights, rd)
        with np.errstate(invalid="ignore"):
            abs_studentized = scores["studentized"]
            self._n_studentized += int(np.count_nonzero(abs_studentized > STUDENTIZED_LIMIT))
            self._n_extreme += int(np.count_nonzero(abs_studentized > self._extreme_threshold))
            self._n_leverage += int(np.count_nonzero(rd.leverage > self._leverage_threshold))
            self._n_cooks += int(np.count_nonzero(rd.cooks > self._cooks_threshold))

    def _update_tests(
        self, batch: DesignBatch | CodedBatch, rd: RowDiagnostics, cross: CrossProducts
    ) -> None:
        """Add a batch to Breusch–Pagan and RESET, from the fit or by their own regressions."""
        e = rd.weighted_resid
        if isinstance(self._bp, BreuschPaganFromFit):
            self._bp.update(cross, e)
        elif isinstance(batch, DesignBatch):  # coded rows: `_update_coded_sums`
            self._bp.update(batch.x, e)
        if isinstance(self._reset, ResetFromFit):
            self._reset.update(cross, rd.fitted, rd.resid, batch.weights)
        elif isinstance(batch, CodedBatch):
            self._reset.update_coded(batch.design, batch.y, rd.fitted, batch.weights)
        else:
            self._reset.update(batch.x, batch.y, rd.fitted, batch.weights)

    def _update_meat(
        self, shifted: FloatArray, weights: FloatArray | None, rd: RowDiagnostics
    ) -> None:
        """Add ``Σ x~ x~' e² ω`` for HC0 (ω = 1), HC2 (1/(1-h)) and HC3 (1/(1-h)²).

        Each as ``B'B`` with ``B = x~ |e| sqrt(ω)``, which numpy hands to a symmetric
        rank-k update: half the work of the general product. `GRAM_CHUNK_ROWS` rows at a
        time, so each scaled chunk is still in cache for its product.
        """
        roots = _meat_roots(weights, rd)
        n_rows = shifted.shape[0]
        block = np.empty((min(n_rows, GRAM_CHUNK_ROWS), shifted.shape[1]), order="F")
        for start in range(0, n_rows, GRAM_CHUNK_ROWS):
            rows = slice(start, min(start + GRAM_CHUNK_ROWS, n_rows))
            chunk = block[: rows.stop - start]
            for j, u in enumerate(roots):
                np.multiply(shifted[rows], u[rows, np.newaxis], out=chunk)
                self._meat[j] += np.dot(chunk.T, chunk)

    def _update_coded_sums(
        self,
        design: CodedDesign,
        dense: Sequence[FloatArray],
        weights: FloatArray | None,
        rd: RowDiagnostics,
    ) -> None:
        """Add the same sums as `_update_meat` for coded rows, as counts and per-level sums.

        `dense` are the design's dense columns in the fit's shift; `_meats` writes the
        blocks out (`LevelGram`). The auxiliary Breusch–Pagan regression, when it runs, takes
        its sums from the same call: ``e²`` (less the fit's mean of it) unweighted.
        """
        roots = _meat_roots(weights, rd)
        blocks = [SummedBlock(len(dense), u * u, u) for u in roots]
        columns, shifts = list(dense), np.zeros(len(dense))
        bp = self._bp if isinstance(self._bp, BreuschPaganAccumulator) else None
        if bp is not None:
            e = rd.weighted_resid
            offset = self.fit.rss / self.fit.n if self.fit.n else 0.0
            columns.append(e * e)
            shifts = np.append(shifts, offset)
            blocks.append(SummedBlock(len(columns)))
        self._coded_layout = (
            design.dense_positions,
            [f.positions for f in design.factors],
            design.n_cols,
        )
        sums = level_grams(
            [f.codes for f in design.factors],
            [f.n_levels for f in design.factors],
            columns,
            shifts,
            blocks,
            has_intercept=True,
        )
        if bp is not None:
            bp_shift = np.append(self.fit.column_shift[design.dense_positions], shifts[-1])
            bp.add_coded(design, sums.pop(), bp_shift)
        for j, blocks_j in enumerate(sums):
            if len(self._coded_meat) <= j:
                self._coded_meat.append(blocks_j)
            else:
                self._coded_meat[j].add(blocks_j)

    def _meats(self) -> FloatArray:
        """Return the HC0, HC2 and HC3 meats over the kept columns, coded rows' blocks included.

        The blocks of coded rows (indicators unshifted) move to the fit's shift, which
        subtracts each indicator's shift times the ones column, by a rank-2 update.
        """
        if self._coded_layout is None:
            return self._meat
        kept, x_shift = self.fit.kept_columns, self.fit.column_shift
        indicators = list(self._indicators)
        delta = np.zeros(x_shift.size)
        delta[indicators] = -x_shift[indicators]
        meats = self._meat.copy()
        for j, blocks in enumerate(self._coded_meat):
            gram = blocks.assemble(*self._coded_layout)
            if delta.any():
                g0 = gram[:, 0].copy()
                gram += np.outer(g0, delta) + np.outer(delta, g0) + g0[0] * np.outer(delta, delta)
            meats[j] += gram[np.ix_(kept, kept)]
        return meats

    def merge(self, other: DiagnosticsAccumulator) -> DiagnosticsAccumulator:
        """Fold in an accumulator over other rows of the same fit and config; returns self.

        The rows may come from anywhere in the file: Durbin–Watson joins batches by
        position. Which levels of a segment column past its level cap get rows of their own
        depends on the order the levels were met in.

        Raises
        ------
        SpecError
            If `other` was built for another fit or config.
        """
        same_fit = other.fit.names == self.fit.names and np.array_equal(
            other.fit.coef, self.fit.coef, equal_nan=True
        )
        same_config = (
            other.config.segment_columns == self.config.segment_columns
            and other.config.top_k == self.config.top_k
            and other.config.binned_edges.keys() == self.config.binned_edges.keys()
            and np.array_equal(other.config.fine_edges, self.config.fine_edges)
            and np.array_equal(other.config.hist_edges, self.config.hist_edges)
            and other.config.exact_tests == self.config.exact_tests
        )
        if not (same_fit and same_config):
            msg = (
                "cannot merge diagnostics built for a different fit or configuration; build "
                "every part from the same `fit` and `config`"
            )
            raise SpecError(msg)
        self._n += other._n
        self._moments.merge(other._moments)
        self._dw.merge(other._dw)
        self._hist += other._hist
        self._fine += other._fine
        self._min = min(self._min, other._min)
        self._max = max(self._max, other._max)
        self._studentized += other._studentized
        low, high = other._studentized_range
        self._studentized_range = (
            min(self._studentized_range[0], low),
            max(self._studentized_range[1], high),
        )
        for name, binned in self._binned.items():
            binned.merge(other._binned[name])
        for criterion, top in self._worst.items():
            top.merge(other._worst[criterion])
        for col, seg in self._segments.items():
            seg.merge(other._segments[col])
        self._merge_tests(other)
        self._meat += other._meat
        if not self._coded_meat:
            self._coded_meat = copy.deepcopy(other._coded_meat)
        elif other._coded_meat:
            for mine, theirs in zip(self._coded_meat, other._coded_meat, strict=True):
                mine.add(theirs)
        self._coded_layout = self._coded_layout or other._coded_layout
        self._n_studentized += other._n_studentized
        self._n_extreme += other._n_extreme
        self._n_leverage += other._n_leverage
        self._n_cooks += other._n_cooks
        return self

    def _merge_tests(self, other: DiagnosticsAccumulator) -> None:
        """Merge Breusch–Pagan and RESET, computed the same way in both (same fit and config)."""
        pairs: tuple[tuple[Any, Any], ...] = ((self._bp, other._bp), (self._reset, other._reset))
        for mine, theirs in pairs:
            assert type(theirs) is type(mine)
            mine.merge(theirs)

    def _histogram(self) -> ResidualHistogram:
        empty = self._n == 0
        return ResidualHistogram(
            edges=self.config.hist_edges,
            counts=self._hist[1:-1].copy(),
            below=int(self._hist[0]),
            above=int(self._hist[-1]),
            minimum=math.nan if empty else self._min,
            maximum=math.nan if empty else self._max,
            quantiles=dict(
                zip(
                    RESID_QUANTILES,
                    quantiles_from_counts(
                        self._fine, self.config.fine_edges, self._min, self._max, RESID_QUANTILES
                    ),
                    strict=True,
                )
            ),
            fine_edges=self.config.fine_edges,
            fine_counts=self._fine.copy(),
        )

    def _robust_se(self) -> dict[str, RobustStdErrors]:
        fit = self.fit
        dof_ratio = self._n / fit.df_resid if fit.df_resid > 0 else math.nan
        se = [np.sqrt(np.diag(fit.sandwich(m))) for m in self._meats()]
        return {
            name: RobustStdErrors(
                hc0=float(se[0][j]),
                hc1=float(se[0][j] * math.sqrt(dof_ratio)),
                hc2=float(se[1][j]),
                hc3=float(se[2][j]),
            )
            for j, name in enumerate(fit.names)
        }

    def finalize(self) -> Diagnostics:
        """Turn the sums into results; the accumulator can keep taking batches afterwards."""
        worst = {
            criterion: tuple(
                WorstRow(
                    row=int(top.rows[i]),
                    fitted=float(top.payload["fitted"][i]),
                    resid=float(top.payload["resid"][i]),
                    weighted_resid=float(top.payload["weighted_resid"][i]),
                    studentized=float(top.payload["studentized"][i]),
                    leverage=float(top.payload["leverage"][i]),
                    cooks=float(top.payload["cooks"][i]),
                )
                for i in range(top.rows.size)
            )
            for criterion, top in self._worst.items()
        }
        tests = {
            "breusch_pagan": self._bp.finalize(),
            "reset": self._reset.finalize(),
            "jarque_bera": jarque_bera(self._moments),
            "durbin_watson": self._dw.finalize(),
        }
        counts = ThresholdCounts(
            studentized=self._n_studentized,
            extreme=self._n_extreme,
            extreme_threshold=self._extreme_threshold,
            leverage=self._n_leverage,
            leverage_threshold=self._leverage_threshold,
            cooks=self._n_cooks,
            cooks_threshold=self._cooks_threshold,
        )
        return Diagnostics(
            n=self._n,
            histogram=self._histogram(),
            binned={name: b.finalize() for name, b in self._binned.items()},
            worst=worst,
            segments={col: seg.finalize() for col, seg in self._segments.items()},
            segments_capped=tuple(c for c, seg in self._segments.items() if seg.is_capped),
            tests=tests,
            robust_se=self._robust_se() if self._n else {},
            counts=counts,
            resid_skewness=self._moments.skewness(),
            resid_kurtosis=self._moments.kurtosis(),
            flags=raise_flags(self.fit, self.config, self._n, counts, tests, self._moments),
            studentized_quantiles=self._studentized_quantiles(),
        )

    def _add_studentized(self, studentized: FloatArray) -> None:
        """Count the finite studentized residuals on their fine grid (for the quantile chart)."""
        is_finite = np.isfinite(studentized)
        finite = studentized if is_finite.all() else studentized[is_finite]  # no copy: all are
        if not finite.size:
            return
        cells = _studentized_lookup().fine(finite)
        self._studentized += np.bincount(cells, minlength=self._studentized.size)
        low, high = self._studentized_range
        self._studentized_range = (min(low, float(finite.min())), max(high, float(finite.max())))

    def _studentized_quantiles(self) -> dict[float, float]:
        if not self._studentized.sum():
            return {}
        low, high = self._studentized_range
        values = quantiles_from_counts(
            self._studentized, STUDENTIZED_EDGES, low, high, QUANTILE_CHART_PROBS
        )
        return dict(zip(QUANTILE_CHART_PROBS, values, strict=True))
