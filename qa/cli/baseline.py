"""``lacuna baseline``: set a unit's baseline from chosen sessions, or show its baselines."""

from __future__ import annotations

from ..errors import InputError
from .history_cmd import add_db_option, check_unit, open_history, parse_ids, print_table


def add_parser(sub) -> None:
    p = sub.add_parser("baseline", help="set (or show) the baseline of a unit and phantom",
                       description="Set the baseline of a unit and phantom to the mean of "
                       "the given sessions (or of its first N sessions) and print it. "
                       "Without --sessions or --first, print the baselines set so far.")
    p.add_argument("--unit", metavar="ID", required=True, help="the unit")
    p.add_argument("--phantom", metavar="NAME", required=True,
                   help="the phantom's name, as recorded with the sessions")
    choose = p.add_mutually_exclusive_group()
    choose.add_argument("--sessions", metavar="IDS", default=None,
                        help="session ids separated by commas, e.g. 3,4,5")
    choose.add_argument("--first", metavar="N", type=int, default=None,
                        help="the unit's first N sessions with this phantom (by date)")
    p.add_argument("--reason", metavar="TEXT", default=None,
                   help="why the baseline is set (required when setting one)")
    p.add_argument("--by", metavar="NAME", default="", help="who sets it (optional)")
    add_db_option(p)
    p.set_defaults(func=run)


def _print_baseline(b) -> None:
    state = "in force" if b.superseded_at is None else \
        f"superseded {b.superseded_at[:16]} by baseline {b.superseded_by}"
    print(f"baseline {b.id} of unit {b.unit_id}, phantom {b.phantom}: set {b.set_at[:16]}"
          + (f" by {b.set_by}" if b.set_by else "") + f", {state}")
    print(f"  from sessions {', '.join(map(str, b.session_ids))}; reason: {b.reason}")
    print_table(("metric", "value", "sd", "n", "unit"),
                [(name, f"{v.value:.6g}", "—" if v.sd is None else f"{v.sd:.3g}", v.n,
                  v.unit) for name, v in b.values.items()])


def run(args) -> int:
    with open_history(args.db) as h:
        check_unit(h, args.unit)
        sessions = h.sessions(unit_id=args.unit, phantom=args.phantom)
        if not sessions:
            phantoms = sorted({s.phantom for s in h.sessions(unit_id=args.unit)})
            raise InputError(f"unit '{args.unit}' has no sessions with phantom "
                             f"'{args.phantom}' (its phantoms: {', '.join(phantoms)})",
                             source=str(h.path), field="--phantom")
        if args.sessions is None and args.first is None:
            baselines = h.baseline_history(args.unit, args.phantom)
            if not baselines:
                print(f"no baseline set for unit {args.unit}, phantom {args.phantom}")
            for b in baselines:
                _print_baseline(b)
            return 0
        if args.reason is None or not args.reason.strip():
            raise InputError("a baseline change needs a reason (--reason TEXT)",
                             field="--reason")
        if args.sessions is not None:
            ids = parse_ids(args.sessions, "--sessions")
        else:
            if args.first < 1:
                raise InputError(f"expected a count of 1 or more, got {args.first}",
                                 field="--first")
            if args.first > len(sessions):
                raise InputError(f"unit '{args.unit}' has only {len(sessions)} session(s) "
                                 f"with phantom '{args.phantom}', not {args.first}",
                                 field="--first")
            ids = [s.id for s in sessions[:args.first]]
        new_id = h.set_baseline(args.unit, args.phantom, session_ids=ids,
                                reason=args.reason, set_by=args.by)
        (b,) = [b for b in h.baseline_history(args.unit, args.phantom) if b.id == new_id]
        _print_baseline(b)
    return 0
