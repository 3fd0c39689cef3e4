"""`triage compare`: fit several models to the same rows and compare them side by side."""

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
    integer_option,
)


def register(subparsers: Any) -> None:
    """Add the `compare` command."""
    parser = subparsers.add_parser(
        "compare",
        help="fit several models to the same rows and compare them",
        description=(
            "Fit each `--terms` model to the rows every model can use, and show in-sample "
            "and held-out criteria side by side, with F tests for nested pairs."
        ),
    )
    add_source_options(parser)
    add_model_options(parser, terms_repeatable=True)
    add_row_options(parser)
    add_engine_options(parser)
    group = add_holdout_options(parser)
    group.add_argument(
        "--folds",
        type=integer_option("--folds", minimum=2),
        default=5,
        metavar="K",
        help="folds of the K-fold RMSE on the sample (default 5)",
    )
    group.add_argument(
        "--robust",
        action="store_true",
        help="refit each model on the sample by Huber's method and show coefficient shifts",
    )
    group.add_argument(
        "--curvature",
        action="store_true",
        help="for each numeric predictor, show how much a spline lowers the K-fold RMSE",
    )
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    add_width_option(parser)
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Run `triage compare`."""
    from triage.cli.options import (
        holdout_rule_from_args,
        open_source_from_args,
        pass_engine,
        spec_from_args,
        text_width,
    )
    from triage.cli.progress import StderrProgress
    from triage.engine.compare import (
        compare_models,
        curvature_check_outcome,
        robust_check_outcome,
    )
    from triage.engine.signals import stop_event
    from triage.views import compare as views

    rule = holdout_rule_from_args(args)
    source = open_source_from_args(args)
    labels = [str(t) for t in args.terms]
    specs = [spec_from_args(args, source, terms=t) for t in labels]
    progress = StderrProgress()
    try:
        with pass_engine(args) as engine:
            outcome = compare_models(
                source,
                specs,
                labels,
                rows=args.rows,
                seed=args.seed,
                sampling=args.sample,
                holdout=rule,
                folds=args.folds,
                on_progress=progress,
                cancel=stop_event,
                engine=engine,
            )
    finally:
        progress.finish()
    robust = (
        [robust_check_outcome(m.outcome, holdout=rule) for m in outcome.models]
        if args.robust
        else []
    )
    curvature = (
        [
            curvature_check_outcome(m.outcome, folds=args.folds, seed=args.seed, holdout=rule)
            for m in outcome.models
        ]
        if args.curvature
        else []
    )
    if args.json:
        document = views.comparison_to_json(outcome)
        if robust:
            document["robust"] = [views.robust_to_json(r) for r in robust]
        if curvature:
            document["curvature"] = [views.curvature_to_json(c) for c in curvature]
        json.dump(document, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
        return 0
    width = text_width(args)
    sections = [views.render_comparison(outcome, width=width)]
    sections += [
        views.render_robust_check(r, label=f"#{i + 1} {m.label}", width=width)
        for i, (r, m) in enumerate(zip(robust, outcome.models, strict=False))
    ]
    sections += [
        views.render_curvature_check(c, label=f"#{i + 1} {m.label}", width=width)
        for i, (c, m) in enumerate(zip(curvature, outcome.models, strict=False))
    ]
    sys.stdout.write("\n\n".join(sections) + "\n")
    return 0
