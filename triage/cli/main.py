"""Entry point of the `triage` command: one subcommand per module in `triage.cli.commands`."""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import warnings
from collections.abc import Sequence
from typing import Any, NoReturn

# One BLAS thread: the passes decode data in a read-ahead thread that keeps about 1.9 of
# 2 cores busy, and a second BLAS thread competing with it was always slower (DESIGN.md,
# "Memory and speed"). Set before numpy loads; a user's own setting wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

from triage import __version__
from triage.errors import TriageError, numeric_warning_message, one_line

COMMANDS: tuple[str, ...] = ("fit", "report", "export", "compare", "sample", "open")
"""Subcommands, each a module in `triage.cli.commands` with `register(subparsers)`."""


class _Parser(argparse.ArgumentParser):
    """An argument parser that reports a usage error in one line (exit 2), not a usage block.

    Options must be spelled out: with abbreviations, `export --by` would be read as
    `--by-criterion`, an option of another meaning.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        kwargs.setdefault("allow_abbrev", False)
        super().__init__(*args, **kwargs)

    def error(self, message: str) -> NoReturn:
        """Print `message` with a pointer to `--help` and exit with code 2."""
        self.exit(2, f"{self.prog}: {one_line(message)}; see `{self.prog} --help`\n")


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser with every subcommand registered."""
    parser = _Parser(
        prog="triage",
        description="Find where and why a least-squares model fits badly, on tables of any size.",
        epilog="`triage DATA` with no command opens the terminal app.",
    )
    parser.add_argument("--version", action="version", version=f"triage {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        module = importlib.import_module(f"triage.cli.commands.{name}")
        module.register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line and return the exit code (2 for bad input, with one line on stderr)."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    if args_list and not args_list[0].startswith("-") and args_list[0] not in COMMANDS:
        args_list.insert(0, "open")
    parser = build_parser()
    args = parser.parse_args(args_list)
    if args.command is None:
        parser.print_help()
        return 0
    if getattr(args, "workers", None) is not None:
        from triage.engine.workers import set_pass_workers  # standard library only

        set_pass_workers(args.workers)
    from triage.data.bus_guard import install_bus_guard
    from triage.engine.signals import StopRequested, received, stop_on_signals

    install_bus_guard()  # a file cut short under a memory-mapped read: one line, exit 2

    try:
        with stop_on_signals(), warnings.catch_warnings():
            # numpy reports overflow and invalid values as RuntimeWarnings; none may reach
            # the terminal as a warning: each becomes an error, reported below in one line.
            warnings.simplefilter("error", RuntimeWarning)
            return int(args.handler(args))
    except StopRequested as stop:
        print(f"triage: {stop.message}", file=sys.stderr)
        return stop.exit_code
    except TriageError as error:
        signalled = received()  # a pass that saw the signal's cancel event first
        if signalled is not None:
            print(f"triage: {signalled.message}", file=sys.stderr)
            return signalled.exit_code
        print(f"triage: {error}", file=sys.stderr)
        return 2
    except RuntimeWarning as warning:
        print(f"triage: {numeric_warning_message(warning)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("triage: stopped", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader of our output went away (`triage fit ... --json | head`): stop quietly,
        # and point stdout at nothing so Python's exit flush does not fail again.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
