"""`triage export`: write the worst rows with diagnostics, or every row's diagnostics."""

from __future__ import annotations

import argparse
import sys
from typing import TYPE_CHECKING, Any

from triage.cli.options import (
    add_engine_options,
    add_model_options,
    add_row_options,
    add_source_options,
    integer_option,
)

if TYPE_CHECKING:
    from triage._typing import RowsToRead
    from triage.core.spec import ModelSpec
    from triage.results.fit import DataSummary


def register(subparsers: Any) -> None:
    """Add the `export` command."""
    parser = subparsers.add_parser(
        "export",
        help="write the worst rows, or every row's diagnostics, to Parquet or CSV",
        description=(
            "Write the worst rows with all their original columns plus diagnostic columns, "
            "or (--all) one line per row of the source: its position, its status (used, or "
            "why the fit left it out) and, where the model scored it, fitted value, residual, "
            "studentized residual, leverage and Cook's distance. Rows are ranked and fitted "
            "on every row unless --rows N asks for a sample. The input is never changed."
        ),
    )
    add_source_options(parser)
    add_model_options(parser)
    add_row_options(parser, every_row=True)
    add_engine_options(parser)
    what = parser.add_mutually_exclusive_group(required=True)
    what.add_argument(
        "--worst",
        type=integer_option("--worst", minimum=1),
        metavar="K",
        help="export the K worst rows",
    )
    what.add_argument(
        "--all", action="store_true", help="one line per source row: status and diagnostics"
    )
    parser.add_argument(
        "--by-criterion",
        choices=("cooks", "studentized", "leverage", "abs_resid"),
        default="cooks",
        help="ranking for --worst (default cooks)",
    )
    parser.add_argument("--out", required=True, help="output file, .parquet or .csv")
    parser.add_argument("--force", action="store_true", help="replace an existing output file")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Run `triage export`."""
    from triage.cli.options import open_source_from_args, pass_engine, spec_from_args
    from triage.cli.progress import StderrProgress
    from triage.core.design import STATUS_UNSEEN
    from triage.data.export import PERSONAL_DATA_NOTICE, check_output_path
    from triage.engine.export import export_all_rows, export_worst_rows
    from triage.engine.signals import stop_event

    source = open_source_from_args(args)
    spec = spec_from_args(args, source)
    check_output_path(args.out, force=args.force, protected=(*source.files, source.path))
    note = export_note(spec, args.rows)
    progress = StderrProgress()
    try:
        with pass_engine(args) as engine:
            if args.all:
                written, statuses = export_all_rows(
                    source,
                    spec,
                    args.out,
                    rows=args.rows,
                    seed=args.seed,
                    sampling=args.sample,
                    force=args.force,
                    on_progress=progress,
                    cancel=stop_event,
                    engine=engine,
                    note=note,
                )
            else:
                written, n_rows, data = export_worst_rows(
                    source,
                    spec,
                    args.out,
                    k=args.worst,
                    criterion=args.by_criterion,
                    rows=args.rows,
                    seed=args.seed,
                    sampling=args.sample,
                    force=args.force,
                    on_progress=progress,
                    cancel=stop_event,
                    engine=engine,
                    note=note,
                )
    finally:
        progress.finish()
    if args.all:
        print(
            f"wrote {sum(statuses.values()):,} rows to {written}, one per source row: "
            + (
                ", ".join(
                    f"{n:,} {status}" for status, n in sorted(statuses.items(), key=_by_count)
                )
            )
        )
    else:
        print(f"wrote {n_rows:,} rows to {written}, {ranked_basis(data, args.by_criterion)}")
    if args.all and statuses.get(STATUS_UNSEEN):
        print(
            f"note: {statuses[STATUS_UNSEEN]:,} rows have a level the sample did not have, so "
            "the model cannot score them; `--rows all` learns every level"
        )
    if spec.target_transform is not None:
        from triage.views.text import target_scale_note

        print(f"note: {target_scale_note(spec)}")
    print(f"note: {PERSONAL_DATA_NOTICE}", file=sys.stderr)
    return 0


def _by_count(item: tuple[str, int]) -> tuple[int, str]:
    """Order statuses with the most rows first (`used` usually)."""
    return -item[1], item[0]


def ranked_basis(data: DataSummary, criterion: str) -> str:
    """Say what the worst rows were ranked among: every row, or a sample and how to widen it."""
    by = {
        "cooks": "Cook's distance",
        "studentized": "studentized residual",
        "leverage": "leverage",
        "abs_resid": "absolute residual",
    }[criterion]
    if data.is_full_pass:
        return f"ranked by {by} among every row ({data.rows_used:,} used in the fit)"
    return (
        f"ranked by {by} among a SAMPLE of {data.rows_used:,} rows only ({data.sample}); "
        "`--rows all` ranks every row"
    )


def export_note(spec: ModelSpec, rows: RowsToRead) -> str:
    """Say in one line which fit scores the exported rows: the model, its filter and basis.

    It goes into the Parquet file's metadata, or a note beside a CSV (as the app's exports).
    """
    from triage._typing import ALL_ROWS
    from triage.views.text import model_formula

    parts = [f"scored by {model_formula(spec)}"]
    if spec.where:
        parts.append(f"where {spec.where}")
    if spec.weights:
        parts.append(f"weights {spec.weights}")
    parts.append(
        "fitted on every row" if rows is ALL_ROWS else f"fitted on a sample of about {rows:,} rows"
    )
    return " | ".join(parts)
