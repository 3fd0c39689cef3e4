"""What one app session holds: the model being built and every fit made so far."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Final

if TYPE_CHECKING:
    import polars as pl

    from triage.core.spec import ModelSpec, Term, TextColumnCheck
    from triage.results.compare import Comparison
    from triage.results.fit import DataSummary, FitOutcome, ReportOutcome
    from triage.tui.settings import Settings

TRANSFORM_CYCLE: Final[tuple[str | None, ...]] = (None, "log", "log1p", "sqrt", "square", "std")
"""Transforms a numeric term steps through with the cycle-transform key."""


def _term_for(column: str, transform: str | None) -> Term:
    """Parse the term for `column` under `transform` (None for the bare column)."""
    from triage.core.spec import parse_terms, quote_name

    name = quote_name(column)
    text = name if transform is None else f"{transform}({name})"
    return parse_terms(text)[1][0]


@dataclass(frozen=True)
class ModelDraft:
    """The model as the user is building it, before it is checked against the data."""

    target: str | None = None
    """Column to explain; None until chosen."""
    terms: tuple[Term, ...] = ()
    """Terms in the order they were added."""
    weights: str | None = None
    """Column of weights, or None."""
    where: str | None = None
    """Row filter (SQL expression), or None."""
    categorical: tuple[str, ...] = ()
    """Columns marked categorical."""
    intercept: bool = True
    """Fit a constant term."""

    def terms_text(self) -> str:
        """Return the terms in the term syntax, e.g. `distance_km, log(stops), depot`."""
        return ", ".join(term.label for term in self.terms)

    def formula(self) -> str:
        """Return `target ~ terms` for the model line (`?` stands for a target not yet chosen)."""
        from triage.core.spec import target_text

        target = "?" if self.target is None else target_text(self.target)
        right = " + ".join(term.label for term in self.terms) or "1"
        return f"{target} ~ {right}"

    def term_of(self, column: str) -> Term | None:
        """Return the single-column term reading `column`, if the model has one."""
        for term in self.terms:
            if term.column == column:
                return term
        return None

    def with_target(self, column: str) -> ModelDraft:
        """Return the draft with `column` as target (and no longer a term or the weights)."""
        terms = tuple(t for t in self.terms if column not in t.columns)
        weights = None if self.weights == column else self.weights
        return replace(self, target=column, terms=terms, weights=weights)

    def with_term_toggled(self, column: str) -> ModelDraft:
        """Return the draft with the term on `column` removed, or the bare column added."""
        if self.term_of(column) is not None:
            return replace(self, terms=tuple(t for t in self.terms if t.column != column))
        target = None if self.target == column else self.target
        return replace(self, target=target, terms=(*self.terms, _term_for(column, None)))

    def with_transform_cycled(self, column: str) -> ModelDraft:
        """Return the draft with the next transform of `TRANSFORM_CYCLE` on `column`'s term.

        A column that is not yet a term is added with the first transform.
        """
        current = self.term_of(column)
        now = None if current is None else current.transform
        if now not in TRANSFORM_CYCLE:
            now = None
        following = TRANSFORM_CYCLE[(TRANSFORM_CYCLE.index(now) + 1) % len(TRANSFORM_CYCLE)]
        if current is None and following is None:
            following = TRANSFORM_CYCLE[1]
        new = _term_for(column, following)
        if current is None:
            return replace(self, terms=(*self.terms, new))
        return replace(self, terms=tuple(new if t is current else t for t in self.terms))

    def with_categorical_toggled(self, column: str) -> ModelDraft:
        """Return the draft with `column` marked categorical, or unmarked."""
        if column in self.categorical:
            return replace(self, categorical=tuple(c for c in self.categorical if c != column))
        return replace(self, categorical=(*self.categorical, column))

    def with_weights_toggled(self, column: str) -> ModelDraft:
        """Return the draft with `column` as weights, or with no weights if it already was."""
        return replace(self, weights=None if self.weights == column else column)

    def with_terms_text(self, text: str) -> ModelDraft:
        """Return the draft with terms typed in the term syntax (`y ~ ...` also sets the target).

        Raises
        ------
        SpecError
            When the text does not parse.
        """
        from triage.core.spec import parse_terms

        target, terms = parse_terms(text)
        return replace(self, target=self.target if target is None else target, terms=terms)

    def with_levels_read(self, spec: ModelSpec) -> ModelDraft:
        """Return the draft with its indicator terms as `spec` reads them (`hour=08` as `hour=8`).

        `spec` is this draft checked against the data (`to_spec`), its terms in the same order.
        """
        if len(spec.terms) != len(self.terms):
            return self
        terms = tuple(
            read if any(p.kind == "indicator" for p in (*term.factors, term)) else term
            for term, read in zip(self.terms, spec.terms, strict=True)
        )
        return replace(self, terms=terms)

    def to_spec(
        self,
        schema: Mapping[str, pl.DataType],
        settings: Settings,
        check_text: TextColumnCheck | None = None,
    ) -> ModelSpec:
        """Check the draft against the columns, with the session's reference levels and limits.

        `check_text` reads a text column to tell numbers with a stray value from real text
        (see `build_spec`).

        Raises
        ------
        SpecError
            With the name of the bad column or term and the closest valid names.
        """
        from triage.core.spec import build_spec

        return build_spec(
            schema,
            target=self.target,
            terms=self.terms,
            intercept=self.intercept,
            weights=self.weights,
            where=self.where,
            categorical=self.categorical,
            reference=settings.reference,
            max_levels=settings.max_levels,
            max_memory=settings.max_memory,
            drop_invalid=settings.drop_invalid,
            check_text=check_text,
        )


def draft_from_settings(settings: Settings) -> ModelDraft:
    """Return the model the settings start with, before their terms text is parsed."""
    return ModelDraft(
        target=settings.target,
        weights=settings.weights,
        where=settings.where,
        categorical=settings.categorical,
        intercept=settings.intercept,
    )


def draft_from_spec(spec: ModelSpec) -> ModelDraft:
    """Return the model of a fit as a draft, so editing starts from that fit's model."""
    from triage.core.spec import parse_terms

    text = ", ".join(term.label for term in spec.terms)
    return ModelDraft(
        target=spec.target,
        terms=parse_terms(text)[1] if text else (),
        weights=spec.weights,
        where=spec.where,
        categorical=spec.categorical,
        intercept=spec.intercept,
    )


@dataclass(frozen=True)
class FitLabel:
    """What names a fit wherever its results appear: number, model, filter, marks and basis."""

    number: int
    """1-based number in the session's list."""
    formula: str
    """The model in the `target ~ a + b` form."""
    details: tuple[str, ...]
    """Filter, weights, categorical columns and marked rows left out, each as a short phrase."""
    basis: str
    """`EVERY ROW` or `SAMPLE`."""
    rows_used: int
    """Rows the fit was computed on."""

    @classmethod
    def of(cls, number: int, outcome: FitOutcome, excluded: int) -> FitLabel:
        """Label the fit `number` of `outcome`, with `excluded` marked rows left out."""
        from triage.views.text import model_formula

        spec, data = outcome.spec, outcome.data
        details = []
        if spec.where:
            details.append(f"where {spec.where}")
        if spec.weights:
            details.append(f"weights {spec.weights}")
        if spec.categorical:
            details.append("categorical " + ", ".join(spec.categorical))
        if excluded:
            details.append(f"{excluded:,} marked left out")
        return cls(
            number=number,
            formula=model_formula(spec),
            details=tuple(details),
            basis=basis_word(data),
            rows_used=data.rows_used,
        )

    def one_line(self) -> str:
        """Describe the fit in one line, e.g. for an export's note."""
        parts = [f"fit #{self.number}: {self.formula}", *self.details]
        parts.append(f"computed on {self.basis}, {self.rows_used:,} rows used")
        return " | ".join(parts)


def basis_word(data: DataSummary) -> str:
    """Return `EVERY ROW` or `SAMPLE`: the rows a result was computed on."""
    return "EVERY ROW" if data.is_full_pass else "SAMPLE"


@dataclass(frozen=True, eq=False)
class SessionFit:
    """One fit of the session, kept so the user can switch back to it."""

    number: int
    """1-based number in the session's list."""
    report: ReportOutcome
    """The fit and its diagnostics."""
    excluded: frozenset[int]
    """Source positions left out (marked rows of a what-if refit)."""
    baseline: int | None
    """Number of the fit this one was refitted from without marked rows, else None."""

    @property
    def is_full_pass(self) -> bool:
        """True when every row of the source was read."""
        return self.report.outcome.data.is_full_pass

    @property
    def label(self) -> FitLabel:
        """The fit's number, model, filter, marks and basis."""
        return FitLabel.of(self.number, self.report.outcome, len(self.excluded))


def compare_session_fits(
    fits: Sequence[SessionFit], current: SessionFit
) -> tuple[tuple[int, ...], Comparison]:
    """Compare the session's fits that used the same rows as `current`.

    Information criteria and F tests only compare models fitted to the same rows, so only
    fits with the same basis (sample or every row), filter, weights, marked rows left out
    and row count take part.

    Returns
    -------
    tuple of int, Comparison
        The numbers of the fits compared (in session order) and their comparison.
    """
    from triage.core.compare import compare_fits

    def basis(fit: SessionFit) -> tuple[object, ...]:
        outcome = fit.report.outcome
        return (
            fit.is_full_pass,
            fit.excluded,
            outcome.spec.where,
            outcome.spec.weights,
            outcome.spec.target,
            outcome.data.rows_used,
        )

    same = [fit for fit in fits if basis(fit) == basis(current)]
    comparison = compare_fits(
        [f"#{fit.number}" for fit in same], [fit.report.outcome.fit for fit in same]
    )
    return tuple(fit.number for fit in same), comparison
