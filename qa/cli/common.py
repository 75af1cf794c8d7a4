"""Options and printing shared by several subcommands."""

from __future__ import annotations

import argparse
from pathlib import Path

from ..errors import InputError
from ..fileio import check_writable
from ..history import DEFAULT_FILE_NAME
from ..session import SessionResult


def add_output_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--out", metavar="DIR", default="output",
                        help="folder for the PDF log and, unless --history is given, the "
                             "history database (default: ./output)")
    parser.add_argument("--json", metavar="FILE", default=None,
                        help="also write the results as JSON to FILE")
    parser.add_argument("--history", metavar="FILE", default=None,
                        help=f"history database (default: DIR/{DEFAULT_FILE_NAME})")
    parser.add_argument("--no-history", action="store_true",
                        help="do not read baselines from or record the session in a history")
    parser.set_defaults(check_outputs=check_outputs)


def check_outputs(args) -> None:
    """Refuse output places that cannot be written, before any work (one line, exit 2).

    ``--out`` must be a folder or a place where one can be made; ``--json`` and the
    history file must be writable files (:func:`qa.fileio.check_writable`). Nothing is
    created here.
    """
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise InputError("is a file; expected a folder for the log", source=str(out),
                         field="--out")
    check_writable(out / "log.pdf", field="--out")
    if args.json:
        check_writable(args.json, field="--json")
    history = history_path(args)
    if history is not None:
        check_writable(history, field="--history")


def history_path(args) -> Path | None:
    if args.no_history:
        return None
    return Path(args.history) if args.history else Path(args.out) / DEFAULT_FILE_NAME


def existing_file(path: str, what: str) -> Path:
    p = Path(path)
    if not p.exists():
        raise InputError(f"{what} not found", source=path)
    return p


def print_summary(result: SessionResult, report, json_path) -> None:
    """A short table of the session on standard output."""
    from ..report.pdf import format_value

    rows = [(j.name, format_value(j.measurement.value, j.measurement.uncertainty),
             j.measurement.unit, j.verdict) for j in result.judged]
    widths = [max(len(r[i]) for r in rows + [("metric", "value ± u", "unit", "verdict")])
              for i in range(4)]
    line = "  ".join("{:<%d}" % w for w in widths)
    print(f"Lacuna · unit {result.unit_id} · {result.date} · phantom {result.phantom.name} · "
          f"profile {result.profile.name}")
    print(line.format("metric", "value ± u", "unit", "verdict"))
    print(line.format(*("-" * w for w in widths)))
    for r in rows:
        print(line.format(*r))
    print(f"overall: {result.overall}")
    print(f"log:     {report}")
    if json_path:
        print(f"json:    {json_path}")
