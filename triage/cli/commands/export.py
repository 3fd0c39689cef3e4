"""`triage export`: write the worst rows with diagnostics, or every row's diagnostics."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from triage.cli.commands.report import add_diagnostics_options, segment_columns
from triage.cli.options import (
    add_engine_options,
    add_model_options,
    add_row_options,
    add_source_options,
    integer_option,
)


def register(subparsers: Any) -> None:
    """Add the `export` command."""
    parser = subparsers.add_parser(
        "export",
        help="write the worst rows, or every row's diagnostics, to Parquet or CSV",
        description=(
            "Write the worst rows with all their original columns plus diagnostic columns, "
            "or (--all) every row's position, fitted value, residual, studentized residual, "
            "leverage and Cook's distance. The input is never changed."
        ),
    )
    add_source_options(parser)
    add_model_options(parser)
    add_row_options(parser)
    add_engine_options(parser)
    add_diagnostics_options(parser)
    what = parser.add_mutually_exclusive_group(required=True)
    what.add_argument(
        "--worst",
        type=integer_option("--worst", minimum=1),
        metavar="K",
        help="export the K worst rows",
    )
    what.add_argument("--all", action="store_true", help="export diagnostics for every row")
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
    from triage.data.export import PERSONAL_DATA_NOTICE, check_output_path
    from triage.engine.export import export_all_rows, export_worst_rows

    source = open_source_from_args(args)
    spec = spec_from_args(args, source)
    check_output_path(args.out, force=args.force, protected=(*source.files, source.path))
    progress = StderrProgress()
    try:
        with pass_engine(args) as engine:
            if args.all:
                written, n_rows = export_all_rows(
                    source,
                    spec,
                    args.out,
                    rows=args.rows,
                    seed=args.seed,
                    design=args.sample,
                    force=args.force,
                    on_progress=progress,
                    engine=engine,
                )
            else:
                written, n_rows = export_worst_rows(
                    source,
                    spec,
                    args.out,
                    k=args.worst,
                    criterion=args.by_criterion,
                    rows=args.rows,
                    seed=args.seed,
                    design=args.sample,
                    by=segment_columns(args),
                    force=args.force,
                    on_progress=progress,
                    engine=engine,
                )
    finally:
        progress.finish()
    print(f"wrote {n_rows:,} rows to {written}")
    print(f"note: {PERSONAL_DATA_NOTICE}", file=sys.stderr)
    return 0
