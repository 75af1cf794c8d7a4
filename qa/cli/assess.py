"""``lacuna assess``: measure, judge, record and log one volume from disk."""

from __future__ import annotations

from ..io import TRAVEL_AXES
from ..judge import load_profile
from ..locate import travel_axis_hint
from ..phantom import load_phantom
from ..publish import assess_file
from ..session import volume_geometry
from .common import add_output_options, existing_file, history_path, print_summary


def add_parser(sub) -> None:
    p = sub.add_parser("assess", help="measure a reconstructed volume and write its log",
                       description="Locate the phantom's test objects in VOLUME, measure, "
                       "judge against the limit profile, record in the history and write "
                       "the dated PDF log.")
    p.add_argument("volume", metavar="VOLUME",
                   help="a .npz/.npy/.tif volume with spacing, a DICOM file, or a folder of "
                        "single-frame DICOM slices")
    p.add_argument("--phantom", metavar="FILE", required=True, help="phantom definition (YAML)")
    p.add_argument("--limits", metavar="FILE", required=True, help="limit profile (YAML)")
    p.add_argument("--unit", metavar="ID", default=None,
                   help="unit id (default: the serial number or station name in the header)")
    p.add_argument("--date", metavar="YYYY-MM-DD", default=None,
                   help="session date (default: the acquisition date in the header, else today)")
    p.add_argument("--kind", choices=("acceptance", "routine", "after-update"), default="routine",
                   help="why the check was made (default: routine)")
    p.add_argument("--series", metavar="UID", default=None,
                   help="for a folder holding several series of slices: the one to read, by "
                        "Series Instance UID (or description, or number)")
    p.add_argument("--travel-axis", choices=TRAVEL_AXES, default="rows",
                   help="where the stored images hold the direction of source travel, which "
                        "DICOM does not state: along the rows (default) or down the columns "
                        "(the volume is then read transposed)")
    add_output_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    phantom = load_phantom(existing_file(args.phantom, "phantom definition"))
    profile = load_profile(existing_file(args.limits, "limit profile"))
    profile.check_applies(phantom=phantom.name)
    source = existing_file(args.volume, "volume")
    result, out = assess_file(source, phantom, profile, unit=args.unit, out_dir=args.out,
                              json_path=args.json, history_path=history_path(args),
                              date=args.date, kind=args.kind, series=args.series,
                              travel_axis=args.travel_axis)
    print_summary(result, out.report, out.json)
    note = profile.geometry_note(volume_geometry(result.meta))
    if note:
        print(f"note:    {note}")
    hint = travel_axis_hint(result.meta)
    if hint in result.layout.pose.note:
        print(f"note:    {hint}")
    return result.exit_code
