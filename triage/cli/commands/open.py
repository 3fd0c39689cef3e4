"""`triage open DATA` (also plain `triage DATA`): the full-screen terminal app."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from triage._typing import ALL_ROWS
from triage.cli.options import (
    add_engine_options,
    add_model_options,
    add_row_options,
    add_source_options,
    integer_option,
)

CLOSE_DEADLINE_S = 10.0
"""Seconds the app may take to close after SIGINT, SIGTERM or SIGHUP before it is ended."""


def register(subparsers: Any) -> None:
    """Add the `open` command."""
    parser = subparsers.add_parser(
        "open",
        help="open the terminal app on a data file (the default command)",
        description=(
            "Open a full-screen app to build a model by keys, fit it on a sample at once, "
            "read every row in the background, and drill into the rows and segments where "
            "it fits badly. With --target (and --terms) the model is fitted on opening."
        ),
    )
    add_source_options(parser)
    add_model_options(parser)
    add_row_options(parser)
    add_engine_options(parser)
    keys = parser.add_argument_group("keys")
    keys.add_argument(
        "--keyset",
        default=None,
        metavar="NAME",
        help="a shipped alternative keymap laid over the default (e.g. `fkeys`)",
    )
    keys.add_argument(
        "--keymap",
        type=Path,
        default=None,
        metavar="FILE",
        help="a TOML file of binding-id = key, applied after the user's keymap",
    )
    parser.add_argument(
        "--top",
        type=integer_option("--top", minimum=1),
        default=50,
        metavar="K",
        help="rows kept in each worst-rows list (default 50)",
    )
    parser.add_argument(
        "--show",
        default="",
        metavar="COLS",
        help="up to two columns (an id, a name) shown beside each worst row",
    )
    parser.add_argument(
        "--ordered",
        action="store_true",
        help="rows are in a meaningful order (time): judge serial correlation and trends",
    )
    parser.set_defaults(handler=run)


def settings_from_args(args: argparse.Namespace) -> Any:
    """Turn parsed options into the app's `Settings`."""
    from triage.cli.options import (
        DEFAULT_SAMPLE_ROWS,
        categorical_columns,
        csv_options_from_args,
        parse_reference,
        scheduler_address,
        shown_columns,
    )
    from triage.tui.settings import Settings

    return Settings(
        data=args.data,
        target=args.target,
        terms=args.terms,
        weights=args.weights,
        where=args.where,
        categorical=categorical_columns(args),
        intercept=not args.no_intercept,
        reference=parse_reference(args.reference),
        max_levels=args.max_levels,
        max_memory=args.max_memory,
        drop_invalid=args.drop_invalid,
        csv=csv_options_from_args(args),
        sample_rows=DEFAULT_SAMPLE_ROWS if args.rows is ALL_ROWS else args.rows,
        is_full_at_start=args.rows is ALL_ROWS,
        seed=args.seed,
        sampling=args.sample,
        keyset=args.keyset,
        keymap_file=args.keymap,
        top_k=args.top,
        show=shown_columns(args.show, None),
        is_ordered=args.ordered,
        scheduler=scheduler_address(args.engine, args.scheduler),
    )


def run(args: argparse.Namespace) -> int:
    """Run the app until the user quits (0) or a signal stops it (128 plus its number).

    The data starts opening (and the given model fitting) before Textual loads, so the file
    is read while the interface starts.
    """
    from triage.tui.head_start import HeadStart

    settings = settings_from_args(args)
    head_start = HeadStart(settings).start()
    try:
        from triage.tui.app import make_app

        app = make_app(settings, head_start=head_start)
        app.close_deadline_s = CLOSE_DEADLINE_S
        app.run()
    finally:
        head_start.stop()
    return app.return_code or 0
