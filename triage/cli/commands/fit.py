"""`triage fit`: fit a model by least squares and print the result as text or JSON."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from triage.cli.options import (
    add_engine_options,
    add_holdout_options,
    add_model_options,
    add_row_options,
    add_source_options,
    add_width_option,
)


def register(subparsers: Any) -> None:
    """Add the `fit` command."""
    parser = subparsers.add_parser(
        "fit",
        help="fit a model and print coefficients and fit quality",
        description="Fit a least-squares model on a sample (default) or on every row.",
    )
    add_source_options(parser)
    add_model_options(parser)
    add_row_options(parser)
    add_engine_options(parser)
    add_holdout_options(parser)
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    add_width_option(parser)
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Run `triage fit`."""
    from triage.cli.options import (
        holdout_rule_from_args,
        open_source_from_args,
        pass_engine,
        spec_from_args,
        text_width,
    )
    from triage.cli.progress import StderrProgress
    from triage.engine.signals import stop_event
    from triage.views.json import fit_to_json
    from triage.views.text import render_fit_report

    rule = holdout_rule_from_args(args)
    source = open_source_from_args(args)
    spec = spec_from_args(args, source)
    progress = StderrProgress()
    try:
        with pass_engine(args) as engine:
            if rule is None:
                from triage.engine.passes import fit_model

                outcome = fit_model(
                    source,
                    spec,
                    rows=args.rows,
                    seed=args.seed,
                    sampling=args.sample,
                    on_progress=progress,
                    cancel=stop_event,
                    engine=engine,
                )
                comparison = None
            else:
                from triage.engine.compare import compare_models

                comparison = compare_models(
                    source,
                    [spec],
                    [args.terms],
                    rows=args.rows,
                    seed=args.seed,
                    sampling=args.sample,
                    holdout=rule,
                    on_progress=progress,
                    cancel=stop_event,
                    engine=engine,
                )
                outcome = comparison.models[0].outcome
    finally:
        progress.finish()
    if args.json:
        document = fit_to_json(outcome)
        if comparison is not None:
            from triage.views.compare import holdout_to_json

            document["holdout"] = holdout_to_json(comparison)
        json.dump(document, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
        return 0
    width = text_width(args)
    text = render_fit_report(outcome, width=width)
    if comparison is not None:
        from triage.views.compare import render_holdout_summary

        text += "\n\n" + render_holdout_summary(comparison, width=width)
    sys.stdout.write(text + "\n")
    return 0
