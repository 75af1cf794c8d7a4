"""``lacuna trend``: a unit's trends with control rules, as a dated PDF and printed flags."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from ..fileio import check_writable, write_files_atomic
from ..history.trends import OUTSIDE_ACTION, unit_trends
from ..judge import load_profile
from ..session import safe_unit_id
from .common import existing_file
from .history_cmd import add_db_option, check_unit, open_history, print_table


def add_parser(sub) -> None:
    p = sub.add_parser("trend", help="trend charts and control-rule flags of a unit",
                       description="Chart a unit's metrics over its recorded sessions with "
                       "the baseline, the limits of a profile, Shewhart control limits from "
                       "the baseline sessions, run rules and EWMA; write a dated PDF and "
                       "print the flagged points. Exit code 1 when the latest value of a "
                       "metric is outside an action limit.")
    p.add_argument("--unit", metavar="ID", required=True, help="the unit")
    p.add_argument("--metric", metavar="NAME", action="append", default=None,
                   help="only this metric (may be repeated; default: all)")
    p.add_argument("--phantom", metavar="NAME", default=None,
                   help="the phantom's name (needed when the unit was checked with several)")
    p.add_argument("--limits", metavar="FILE", default=None,
                   help="limit profile (YAML) to draw and judge against")
    add_db_option(p)
    p.add_argument("--out", metavar="DIR", default="output",
                   help="folder for the PDF (default: ./output)")
    p.set_defaults(func=run)


def _describe(t) -> str:
    from ..report.trends import codes

    last = t.latest
    per = None if last is None or last.period is None else t.periods[last.period]
    base = "no baseline" if per is None or per.value is None else f"baseline {per.value:.4g}"
    ctl = "" if per is None or per.control is None else \
        ", control {:.4g} – {:.4g}".format(*per.control.zone(3))
    state = "" if last is None else \
        f"; latest {last.acquired[:10]} {last.value:.4g}: {codes(last.flags) or 'in control'}"
    return (f"{t.metric} ({t.unit}): {len(t.points)} points, {base}{ctl}; "
            f"{len(t.flagged())} flagged{state}")


def run(args) -> int:
    from ..report.trends import render_trend_pdf

    profile = None
    if args.limits is not None:
        profile = load_profile(existing_file(args.limits, "limit profile"))
    today = dt.date.today().isoformat()
    out = check_writable(Path(args.out) / f"{today}_{safe_unit_id(args.unit)}_trend.pdf",
                         field="--out")
    with open_history(args.db) as h:
        check_unit(h, args.unit)
        trends = unit_trends(h, args.unit, phantom=args.phantom, metrics=args.metric,
                             profile=profile)
    if profile is not None:
        profile.check_applies(phantom=trends.phantom)
    write_files_atomic([(out, render_trend_pdf(trends, created=today), "--out")])
    print(f"Lacuna trends · unit {trends.unit_id} · phantom {trends.phantom} · "
          f"{trends.n_sessions} sessions · profile {trends.profile or '(none)'}")
    for t in trends.metrics:
        print(_describe(t))
    rows = [(p.acquired[:16], "now" if p.current else p.session_id, t.metric,
             f"{p.value:.4g}", ", ".join(p.flags))
            for t in trends.metrics for p in t.flagged()]
    if rows:
        print()
        print_table(("acquired", "session", "metric", "value", "flags"), rows)
    print(f"log:     {out}")
    failing = [t.metric for t in trends.metrics
               if t.latest is not None and OUTSIDE_ACTION in t.latest.flags]
    if failing:
        print(f"latest value outside an action limit: {', '.join(failing)}")
    return 1 if failing else 0
