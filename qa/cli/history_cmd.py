"""``lacuna history``: list the sessions of the history database, or export them as CSV.

Also holds the small helpers the history commands share (``--db``, lists of session ids,
plain text tables).
"""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from ..fileio import check_writable
from ..history import DEFAULT_FILE_NAME, History

DEFAULT_DB = Path("output") / DEFAULT_FILE_NAME


def add_db_option(parser) -> None:
    parser.add_argument("--db", metavar="FILE", default=str(DEFAULT_DB),
                        help=f"history database (default: {DEFAULT_DB})")


def open_history(path) -> History:
    """Open an existing history database (never creates one)."""
    p = Path(path)
    if not p.is_file():
        raise InputError("history database not found" if not p.exists()
                         else "expected a database file", source=str(p))
    return History.open(p)


def parse_ids(text: str, option: str) -> list[int]:
    """``"3,4,5"`` -> ``[3, 4, 5]``; anything else is refused naming the option."""
    parts = [t.strip() for t in str(text).split(",")]
    if not parts or not all(t.isdigit() for t in parts):
        raise InputError(f"expected session ids separated by commas, like 3,4,5; got "
                         f"{text!r}", field=option)
    ids = [int(t) for t in parts]
    if len(set(ids)) != len(ids):
        raise InputError(f"a session id is given twice in {text!r}", field=option)
    return ids


def check_unit(history: History, unit_id: str) -> None:
    """Refuse a unit the history has no session of, naming the known units."""
    known = [u.unit_id for u in history.units()]
    if unit_id not in known:
        raise InputError(f"no sessions of unit '{unit_id}' in the history (units: "
                         f"{', '.join(known) or 'none'})", source=str(history.path),
                         field="--unit")


def print_table(header, rows) -> None:
    """Left-aligned columns separated by two spaces, with a rule under the header."""
    rows = [tuple(str(c) for c in r) for r in rows]
    widths = [max(len(r[i]) for r in [tuple(header)] + rows) for i in range(len(header))]
    line = "  ".join("{:<%d}" % w for w in widths)
    print(line.format(*header).rstrip())
    print(line.format(*("-" * w for w in widths)).rstrip())
    for r in rows:
        print(line.format(*r).rstrip())


def add_parser(sub) -> None:
    p = sub.add_parser("history", help="list the recorded sessions, or export them as CSV",
                       description="List the sessions of the history database (all units, "
                       "or one) with their verdicts and the baselines they belong to; "
                       "--csv writes one row per measurement.")
    add_db_option(p)
    p.add_argument("--unit", metavar="ID", default=None, help="only this unit")
    p.add_argument("--csv", metavar="FILE", default=None,
                   help="also write every measurement of these sessions to FILE as CSV")
    p.set_defaults(func=run)


def run(args) -> int:
    if args.csv:
        check_writable(args.csv, field="--csv")  # before the table is printed
    with open_history(args.db) as h:
        if args.unit is not None:
            check_unit(h, args.unit)
        sessions = h.sessions(unit_id=args.unit)
        member: dict[int, list[str]] = {}
        for unit, phantom in sorted({(s.unit_id, s.phantom) for s in sessions}):
            for b in h.baseline_history(unit, phantom):
                tag = f"{b.id}" + ("" if b.superseded_at is None else " (old)")
                for sid in b.session_ids:
                    member.setdefault(sid, []).append(tag)
        rows = [(s.id, s.acquired[:16], s.unit_id, s.phantom, s.kind, s.profile, s.overall,
                 s.unit_info.get("software", "—"), s.n_measurements,
                 ", ".join(member.get(s.id, [])) or "—") for s in sessions]
        # The CSV is written before anything is printed, so a failure gives one line.
        csv = h.export_csv(args.csv, unit_id=args.unit) if args.csv else None
        if rows:
            print_table(("id", "acquired", "unit", "phantom", "kind", "profile", "overall",
                         "software", "figures", "baseline"), rows)
        units = sorted({s.unit_id for s in sessions})
        print(f"{len(sessions)} session(s) of {len(units)} unit(s) in {h.path}")
        if csv is not None:
            print(f"csv: {csv}")
    return 0
