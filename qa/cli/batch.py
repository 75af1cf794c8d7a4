"""``lacuna batch``: assess every phantom session found under one or more folders."""

from __future__ import annotations

import argparse
import datetime as dt
from pathlib import Path

from ..batch import find_sessions, public_text, run_dask, run_local, summary_csv
from ..history import DEFAULT_FILE_NAME
from ..judge import load_profile
from ..phantom import load_phantom
from .common import existing_file


def add_parser(sub) -> None:
    p = sub.add_parser("batch", help="assess every session found in folders",
                       description="Find the phantom sessions (multi-frame DICOM files, "
                       "series of single-frame slices, .npz volumes) under FOLDER..., assess "
                       "each in worker processes (or on a Dask cluster), keep going when one "
                       "fails, and write one log per session and a summary CSV.")
    p.add_argument("folders", metavar="FOLDER", nargs="+", help="folders to search (recursively)")
    p.add_argument("--phantom", metavar="FILE", required=True, help="phantom definition (YAML)")
    p.add_argument("--limits", metavar="FILE", required=True, help="limit profile (YAML)")
    p.add_argument("--unit", metavar="ID", default=None,
                   help="unit id for every session (default: from each header)")
    p.add_argument("--out", metavar="DIR", default="output", help="folder for logs (default: ./output)")
    p.add_argument("--history", metavar="FILE", default=None,
                   help=f"history database (default: DIR/{DEFAULT_FILE_NAME})")
    p.add_argument("--no-history", action="store_true", help="do not record the sessions")
    p.add_argument("--processes", type=_worker_count, default=2, metavar="N",
                   help="worker processes on this machine, at least 1 (default: 2)")
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="run on the Dask cluster at ADDRESS instead (tcp://host:port)")
    p.add_argument("--summary", metavar="FILE", default=None,
                   help="summary CSV (default: DIR/<today>_batch_summary.csv)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def _worker_count(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, got {text!r}")
    return n


def run(args) -> int:
    phantom = existing_file(args.phantom, "phantom definition")
    limits = existing_file(args.limits, "limit profile")
    load_phantom(phantom)            # refuse bad definitions before any work starts
    load_profile(limits)
    out = Path(args.out)
    hist = None if args.no_history else (args.history or str(out / DEFAULT_FILE_NAME))
    tasks = find_sessions(args.folders, phantom=str(phantom), limits=str(limits),
                          out_dir=str(out), history=hist, unit=args.unit)
    if not tasks:
        from ..errors import InputError
        raise InputError("no sessions found (multi-frame DICOM, slice series or .npz)",
                         source=", ".join(args.folders))
    if args.scheduler:
        outcomes = run_dask(tasks, scheduler=args.scheduler, progress=not args.quiet)
    else:
        outcomes = run_local(tasks, processes=args.processes, progress=not args.quiet)
    summary = Path(args.summary) if args.summary else out / f"{dt.date.today()}_batch_summary.csv"
    summary_csv(outcomes, summary)
    ok = [o for o in outcomes if o.ok]
    failed = [o for o in outcomes if not o.ok]
    for o in ok:
        print(f"{o.overall:8s} {o.unit} {o.date}  {public_text(o.task, o.task.label)}")
    for o in failed:
        print(f"{'failed':8s} {public_text(o.task, o.task.label)}: "
              f"{public_text(o.task, o.error)}")
    print(f"{len(ok)} assessed, {len(failed)} failed; summary: {summary}")
    if failed:
        return 2
    return 1 if any(o.overall == "fail" for o in ok) else 0
