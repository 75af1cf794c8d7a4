"""The ``lacuna`` command: one small module per subcommand.

Each subcommand module has ``add_parser(subparsers)`` (which sets ``func`` on its parser)
and a ``run(args) -> int`` function. :func:`main` returns the exit code: 0 when every
limit holds, 1 when an action limit fails, 2 for bad input or usage, with a one-line
message on standard error (no traceback unless ``--traceback`` is given).
"""

from __future__ import annotations

import argparse
import sys

from .. import __version__
from ..errors import InputError
from . import assess, baseline, batch, compare, demo, history_cmd, simulate, trend

SUBCOMMANDS = (demo, assess, batch, simulate, history_cmd, baseline, trend, compare)


class _Parser(argparse.ArgumentParser):
    """argparse with usage errors raised, not printed, so main() can report them."""

    def error(self, message):
        raise InputError(f"{self.prog}: {message} (see '{self.prog} --help')")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="lacuna", description="Quality assurance for limited-angle X-ray "
                     "scanners (DBT and limited-arc CT sections).")
    parser.add_argument("--version", action="version", version=f"lacuna {__version__}")
    parser.add_argument("--traceback", action="store_true",
                        help="show the full traceback when something goes wrong")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for module in SUBCOMMANDS:
        module.add_parser(sub)
    return parser


def main(argv=None) -> int:
    """Run the command line; returns the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    traceback = "--traceback" in argv
    try:
        args = build_parser().parse_args(argv)
        if not getattr(args, "func", None):
            build_parser().print_help(sys.stderr)
            return 2
        if getattr(args, "check_outputs", None):
            args.check_outputs(args)
        return int(args.func(args))
    except InputError as exc:
        if traceback:
            raise
        print(f"lacuna: error: {exc.one_line()}", file=sys.stderr)
        return 2
    except OSError as exc:
        # A file system refusal the checks above could not foresee (a full disk, a file
        # locked by another program): whatever was being written has been rolled back.
        if traceback:
            raise
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"lacuna: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("lacuna: interrupted; nothing half-written was kept", file=sys.stderr)
        return 130


def run() -> None:  # console-script entry point
    sys.exit(main())
