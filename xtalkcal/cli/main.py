"""The parser of every command and the entry point: one sub-parser per command, the
handlers in their command-group modules."""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Callable, Sequence

import xtalkcal.cli.calibrating as calibrating
import xtalkcal.cli.compensating as compensating
import xtalkcal.cli.due as due
import xtalkcal.cli.files as files
import xtalkcal.cli.ledger_views as ledger_views
import xtalkcal.cli.whole_job as whole_job
from xtalkcal.cli.shared import EXIT_USAGE, DefaultsFormatter, print_errors
from xtalkcal.common import __version__
from xtalkcal.exceptions import XtalkcalError

__all__ = ["build_parser", "main"]

# In the order `xtalkcal --help` lists them: the chain of a lab's job, then the rest.
_GROUPS = (files, calibrating, compensating, ledger_views, due, whole_job)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    p = argparse.ArgumentParser(
        prog="xtalkcal",
        description="Measure, cancel and track microwave drive crosstalk on transmon chips. "
                    "A lab's chain: calibrate → settings → verify → report → history → "
                    "due --list → due.",
        formatter_class=DefaultsFormatter,
    )
    p.add_argument("--version", action="version", version=f"xtalkcal {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    def add(name: str, handler: Callable[[argparse.Namespace], int], help: str
            ) -> argparse.ArgumentParser:
        cmd = sub.add_parser(name, help=help, description=help,
                             formatter_class=DefaultsFormatter)
        cmd.set_defaults(handler=handler)
        return cmd

    for group in _GROUPS:
        group.add_commands(add)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``xtalkcal`` command.

    User mistakes (bad files, limits exceeded, unknown names) print one line per problem
    naming the file and field and exit with status 2; a calibration whose fits are rejected
    (or a verification above tolerance) exits with status 1; success is 0. No traceback is
    shown unless ``--debug``.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s")
    if not args.command:
        parser.print_help()
        return EXIT_USAGE
    try:
        return args.handler(args)
    except XtalkcalError as exc:
        if args.debug:
            raise
        print_errors(exc)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("xtalkcal: interrupted", file=sys.stderr)
        return 130
