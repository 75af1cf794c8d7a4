"""``lacuna compare``: a unit before and after a change, from sessions or volume files."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

from ..compare import METHODS, compare_figures, compare_sessions
from ..errors import InputError
from ..fileio import check_writable, write_files_atomic
from ..judge import load_profile
from ..session import safe_unit_id
from .common import existing_file
from .history_cmd import add_db_option, check_unit, open_history, parse_ids, print_table


def add_parser(sub) -> None:
    p = sub.add_parser("compare", help="compare repeated acquisitions before and after a "
                       "change", description="Per metric: the difference of the means "
                       "after minus before, its 95 % interval, whether it exceeds the "
                       "measurement noise and the profile's constancy limit. Sides are "
                       "session ids of the history, or volume files measured with a "
                       "phantom definition. Exit code 1 when a change is beyond a "
                       "constancy action limit.")
    p.add_argument("--unit", metavar="ID", required=True, help="the unit")
    p.add_argument("--before", metavar="IDS", default=None,
                   help="session ids before the change, e.g. 3,4,5")
    p.add_argument("--after", metavar="IDS", default=None,
                   help="session ids after the change, e.g. 8,9,10")
    p.add_argument("--before-volumes", metavar="FILES", default=None,
                   help="volume files before the change, separated by commas")
    p.add_argument("--after-volumes", metavar="FILES", default=None,
                   help="volume files after the change, separated by commas")
    p.add_argument("--phantom", metavar="FILE", default=None,
                   help="phantom definition (YAML), with --before-volumes/--after-volumes")
    p.add_argument("--limits", metavar="FILE", default=None,
                   help="limit profile (YAML) whose constancy limits the changes are "
                        "judged against")
    p.add_argument("--method", choices=METHODS, default="welch",
                   help="interval: welch (default) or a percentile bootstrap")
    add_db_option(p)
    p.add_argument("--json", metavar="FILE", default=None, help="also write JSON to FILE")
    p.add_argument("--out", metavar="DIR", default="output",
                   help="folder for the PDF (default: ./output)")
    p.set_defaults(func=run)


def _read_volumes(files: str, phantom, option: str, profile=None):
    """Read each volume of a comma-separated list and check it against the profile.

    A volume whose geometry (named in its metadata) lies outside the profile's scope is
    refused here, before any volume is measured. Returns ``(names, volumes, notes)``;
    ``notes`` says when a volume does not name its geometry.
    """
    from ..io import read_volume
    from ..session import volume_geometry

    names = [f.strip() for f in files.split(",") if f.strip()]
    if not names:
        raise InputError(f"expected volume files separated by commas, got {files!r}",
                         field=option)
    volumes, notes = [], []
    for name in names:
        volume = read_volume(existing_file(name, "volume"))
        if profile is not None:
            geometry = volume_geometry(volume.meta)
            profile.check_applies(phantom=phantom.name, geometry=geometry)
            notes.append(profile.geometry_note(geometry))
        volumes.append(volume)
    return names, volumes, [n for n in notes if n]


def _volume_figures(volumes, phantom):
    """Measure each volume; returns (figures, dates, software)."""
    from ..session import measure_volume

    figures, dates, software = [], [], []
    for volume in volumes:
        _, results = measure_volume(volume, phantom)
        figures.append({m.name: m for r in results for m in r.measurements})
        dates.append(str(volume.meta.get("acquired", "")))
        if volume.meta.get("software"):
            software.append(str(volume.meta["software"]))
    return figures, dates, tuple(dict.fromkeys(software))


def _comparison(args, profile):
    """The comparison the options ask for, and any notes for the user."""
    by_ids = args.before is not None or args.after is not None
    by_volumes = args.before_volumes is not None or args.after_volumes is not None
    if by_ids == by_volumes:
        raise InputError("give --before and --after (session ids), or --before-volumes and "
                         "--after-volumes (files), not both or neither", field="--before")
    if by_ids:
        if args.before is None or args.after is None:
            raise InputError("give both --before and --after", field="--before")
        before, after = parse_ids(args.before, "--before"), parse_ids(args.after, "--after")
        with open_history(args.db) as h:
            check_unit(h, args.unit)
            return compare_sessions(h, args.unit, before, after, profile=profile,
                                    method=args.method), ()
    if args.before_volumes is None or args.after_volumes is None:
        raise InputError("give both --before-volumes and --after-volumes",
                         field="--before-volumes")
    if args.phantom is None:
        raise InputError("volumes need the phantom definition (--phantom FILE)",
                         field="--phantom")
    from ..phantom import load_phantom

    phantom = load_phantom(existing_file(args.phantom, "phantom definition"))
    if profile is not None:
        profile.check_applies(phantom=phantom.name)
    bn, bv, b_notes = _read_volumes(args.before_volumes, phantom, "--before-volumes", profile)
    an, av, a_notes = _read_volumes(args.after_volumes, phantom, "--after-volumes", profile)
    bf, bd, bs = _volume_figures(bv, phantom)
    af, ad, as_ = _volume_figures(av, phantom)
    return compare_figures(safe_unit_id(args.unit), phantom.name, bf, af, before_ids=bn,
                           after_ids=an, profile=profile, method=args.method,
                           before_dates=bd, after_dates=ad, before_software=bs,
                           after_software=as_), tuple(dict.fromkeys(b_notes + a_notes))


def _g(v) -> str:
    return "—" if v is None else f"{v:.4g}"


def run(args) -> int:
    from ..report.compare import render_comparison_pdf

    profile = None
    if args.limits is not None:
        profile = load_profile(existing_file(args.limits, "limit profile"))
    today = dt.date.today().isoformat()
    # Both outputs are checked before the work and written together afterwards: a
    # failure leaves neither the PDF nor the JSON behind.
    out = check_writable(Path(args.out) / f"{today}_{safe_unit_id(args.unit)}_compare.pdf",
                         field="--out")
    if args.json:
        check_writable(args.json, field="--json")
    c, notes = _comparison(args, profile)
    outputs = [(out, render_comparison_pdf(c, created=today), "--out")]
    if args.json:
        text = json.dumps(dict(c.to_json(), report=str(out)), indent=2,
                          ensure_ascii=False) + "\n"
        outputs.append((Path(args.json), text.encode("utf-8"), "--json"))
    write_files_atomic(outputs)
    print(f"Lacuna comparison · unit {c.unit_id} · phantom {c.phantom} · profile "
          f"{c.profile or '(none)'}")
    print(f"before: {', '.join(map(str, c.before_ids))}"
          + (f" (software {', '.join(c.before_software)})" if c.before_software else ""))
    print(f"after:  {', '.join(map(str, c.after_ids))}"
          + (f" (software {', '.join(c.after_software)})" if c.after_software else ""))
    rows = []
    for m in c.metrics:
        ci = "—" if m.interval is None else f"[{m.interval[0]:.4g}, {m.interval[1]:.4g}]"
        noise = "—" if m.beyond_noise is None else ("yes" if m.beyond_noise else "no")
        rows.append((m.metric, m.unit, f"{len(m.before)}/{len(m.after)}", _g(m.mean_before),
                     _g(m.mean_after), _g(m.difference), ci, noise, m.constancy or "—",
                     m.verdict))
    print_table(("metric", "unit", "n", "before", "after", "difference",
                 f"{100 * c.level:g} % interval", "beyond noise", "constancy", "verdict"),
                rows)
    methods = sorted({m.interval_method for m in c.metrics if m.interval is not None})
    print(f"interval: {'; '.join(methods) or 'none computable'}")
    print(f"overall: {c.overall}")
    print(f"log:     {out}")
    if args.json:
        print(f"json:    {args.json}")
    for note in notes:
        print(f"note:    {note}")
    return c.exit_code
