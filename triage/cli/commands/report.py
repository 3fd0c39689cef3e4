"""`triage report`: fit, then one more pass of residual diagnostics, printed as text or JSON."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from triage.cli.options import (
    add_engine_options,
    add_model_options,
    add_row_options,
    add_source_options,
    add_width_option,
    integer_option,
)


def add_diagnostics_options(parser: argparse.ArgumentParser) -> None:
    """Add the options of pass 2 shared by `report` and `export`."""
    group = parser.add_argument_group("diagnostics")
    group.add_argument(
        "--top",
        type=integer_option("--top", minimum=1),
        default=10,
        metavar="K",
        help="rows per worst-rows list (default 10)",
    )
    group.add_argument(
        "--by",
        default="",
        metavar="COLS",
        help="comma-separated columns to break residuals down by (segments)",
    )
    group.add_argument(
        "--ordered",
        action="store_true",
        help="rows are in a meaningful order (time): judge serial correlation and trends",
    )


def segment_columns(args: argparse.Namespace) -> tuple[str, ...]:
    """Columns named with `--by`."""
    return tuple(c.strip() for c in args.by.split(",") if c.strip())


def register(subparsers: Any) -> None:
    """Add the `report` command."""
    parser = subparsers.add_parser(
        "report",
        help="fit, then show where the model fits badly (charts, tests, worst rows, segments)",
        description="Fit a model, then compute residual diagnostics on the same rows.",
    )
    add_source_options(parser)
    add_model_options(parser)
    add_row_options(parser)
    add_engine_options(parser)
    add_diagnostics_options(parser)
    parser.add_argument(
        "--show",
        default="",
        metavar="COLS",
        help="up to two columns (an id, a name) shown beside each worst row",
    )
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--no-charts", action="store_true", help="leave out the text charts")
    add_width_option(parser)
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Run `triage report`."""
    from triage.cli.options import (
        open_source_from_args,
        pass_engine,
        shown_columns,
        spec_from_args,
        text_width,
    )
    from triage.cli.progress import StderrProgress
    from triage.engine.passes import run_report
    from triage.engine.signals import stop_event

    source = open_source_from_args(args)
    spec = spec_from_args(args, source)
    show = shown_columns(args.show, source.schema())
    progress = StderrProgress()
    try:
        with pass_engine(args) as engine:
            report = run_report(
                source,
                spec,
                rows=args.rows,
                seed=args.seed,
                sampling=args.sample,
                top_k=args.top,
                by=segment_columns(args),
                is_ordered=args.ordered,
                on_progress=progress,
                cancel=stop_event,
                engine=engine,
            )
    finally:
        progress.finish()
    shown = worst_row_values(source, report, show) if show else None
    if args.json:
        from triage.views.json import report_to_json

        document = report_to_json(report, shown=shown)
        json.dump(document, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
        return 0
    from triage.views.text import render_full_report

    text = render_full_report(
        report,
        width=text_width(args),
        charts=not args.no_charts,
        color=False,
        is_ordered=args.ordered,
        shown=shown,
    )
    sys.stdout.write(text + "\n")
    return 0


def worst_row_values(source: Any, report: Any, columns: tuple[str, ...]) -> dict[int, Any]:
    """Read `columns` of every worst row (each listed row once): position -> column -> text."""
    positions = sorted({r.row for rows in report.diagnostics.worst.values() for r in rows})
    frame = source.read_rows(positions).select(columns) if positions else None
    if frame is None:
        return {}
    return {
        position: {c: "(missing)" if v is None else str(v) for c, v in record.items()}
        for position, record in zip(positions, frame.iter_rows(named=True), strict=True)
    }
