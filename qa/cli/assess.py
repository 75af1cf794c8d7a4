"""``lacuna assess``: measure, judge, record and log one volume from disk."""

from __future__ import annotations

from ..fileio import sha256_of
from ..io import read_volume
from ..judge import load_profile
from ..phantom import load_phantom
from ..publish import baselines_for, history_pages, publish
from ..session import judge_session, safe_unit_id
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
    add_output_options(p)
    p.set_defaults(func=run)


def unit_from(volume, explicit: str | None) -> str:
    if explicit:
        return safe_unit_id(explicit)
    for key in ("serial", "station"):
        if volume.meta.get(key):
            return safe_unit_id(str(volume.meta[key]))
    return "unknown-unit"


def run(args) -> int:
    phantom = load_phantom(existing_file(args.phantom, "phantom definition"))
    profile = load_profile(existing_file(args.limits, "limit profile"))
    profile.check_applies(phantom=phantom.name)
    source = existing_file(args.volume, "volume")
    volume = read_volume(source)
    volume = volume.with_meta(source_file=str(volume.meta.get("source_file", source)),
                              checksum=sha256_of(source))
    unit = unit_from(volume, args.unit)
    hist = history_path(args)
    baselines = baselines_for(hist, unit, phantom.name)
    result = judge_session(volume, phantom, profile, unit_id=unit, baselines=baselines,
                           date=args.date, kind=args.kind)
    out = publish(result, volume, out_dir=args.out, json_path=args.json, history_path=hist,
                  extra_pages=history_pages(hist, result, profile))
    print_summary(result, out.report, out.json)
    return result.exit_code
