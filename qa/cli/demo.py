"""``lacuna demo``: the whole chain on a bundled digital phantom.

The scenario is invented (see :mod:`qa.scenario`): the Fenmoor Breast Screening Service
checks its unit FEN-DBT-1 monthly with Lacuna's digital phantom "Tern". On a history
without that unit, the demo first fills in the eleven previous monthly checks (a
baseline is set from the first four, :data:`qa.scenario.BASELINE_MONTHS`), then runs
today's check and writes its log.
"""

from __future__ import annotations

import datetime as dt
import time
from pathlib import Path

from .. import PROJECT_ROOT
from ..fileio import free_name, sha256_of
from ..history import History
from ..io import write_dicom
from ..judge import load_profile
from ..phantom import load_phantom
from ..publish import baselines_for, history_pages, publish, session_record
from ..scenario import BASELINE_MONTHS, UNIT, expose, year_of_checks
from ..session import judge_session
from ..simulate.acquire import expected_transmissions
from ..simulate.profiles import load_geometry
from ..simulate.recon import reconstruct
from ..simulate.run import grid_for
from .common import add_output_options, history_path, print_summary

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
GEOMETRY = PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml"
PROFILE = PROJECT_ROOT / "thresholds" / "demo.yaml"


def add_parser(sub) -> None:
    p = sub.add_parser("demo", help="run the whole chain on the bundled digital phantom",
                       description="Simulate DBT acquisitions of Lacuna's digital phantom, "
                       "reconstruct, measure, judge, record a year of monthly checks of a "
                       "fictional unit and write today's dated PDF log.")
    p.add_argument("--recon", default="fbp", help="reconstruction method (default: fbp)")
    p.add_argument("--seed", type=int, default=2026, help="first noise seed (default: 2026)")
    p.add_argument("--no-volume", action="store_true",
                   help="do not write today's reconstructed volume as DICOM beside the log")
    add_output_options(p)
    p.set_defaults(func=run)


#: Time of day of the scenario's monthly checks (invented, like the rest of it).
CHECK_TIME = "09:30:00"


def _volume(transmissions, geometry, grid, phantom, check, recon):
    projections = expose(transmissions, geometry, check)
    stamp = check.date.replace("-", "") + CHECK_TIME.replace(":", "")   # DICOM DT
    meta = dict(UNIT, acquired=check.date, acquisition_time=CHECK_TIME,
                acquisition_datetime=stamp, simulated="yes", phantom=phantom.name,
                seed=check.seed)
    return reconstruct(projections, grid, method=recon, meta=meta)


def _backfill(hist, transmissions, geometry, grid, phantom, profile, checks, recon) -> None:
    """Record the earlier monthly checks (no logs), setting the baseline on the way."""
    unit = UNIT["serial"]
    for check in checks:
        t0 = time.perf_counter()
        volume = _volume(transmissions, geometry, grid, phantom, check, recon)
        result = judge_session(volume, phantom, profile, unit_id=unit, kind="demo",
                               baselines=baselines_for(hist, unit, phantom.name))
        with History.open(hist) as h:
            h.record(session_record(result, ""))
            if check.index == BASELINE_MONTHS - 1:
                ids = [s.id for s in h.sessions(unit_id=unit, phantom=phantom.name)]
                h.set_baseline(unit, phantom.name, session_ids=ids[:BASELINE_MONTHS],
                               reason=f"commissioning: mean of the first {BASELINE_MONTHS} "
                                      "monthly checks", set_by="lacuna demo")
        print(f"  check {check.date}: {result.overall} ({time.perf_counter() - t0:.0f} s)")


def run(args) -> int:
    t0 = time.perf_counter()
    phantom = load_phantom(PHANTOM)
    geometry = load_geometry(GEOMETRY)
    profile = load_profile(PROFILE)
    profile.check_applies(phantom=phantom.name, geometry=geometry.name)
    grid = grid_for(phantom, geometry)
    unit = UNIT["serial"]
    checks = year_of_checks(dt.date.today(), seed=args.seed)
    hist = history_path(args)
    print(f"simulating {geometry.name} ({geometry.n_views} views, ±{geometry.half_arc_deg:g}°) "
          f"of phantom {phantom.name} ...")
    transmissions = expected_transmissions(phantom, geometry, progress=True)
    if hist is not None:
        with History.open(hist) as h:
            fresh = not h.sessions(unit_id=unit, phantom=phantom.name)
        if fresh:
            print(f"filling the history with {len(checks) - 1} earlier monthly checks of {unit}:")
            _backfill(hist, transmissions, geometry, grid, phantom, profile, checks[:-1],
                      args.recon)
    today = checks[-1]
    volume = _volume(transmissions, geometry, grid, phantom, today, args.recon)
    out = Path(args.out)
    if not args.no_volume:
        vol_path = free_name(out / f"{today.date}_{unit}_volume.dcm")
        write_dicom(volume, vol_path)
        volume = volume.with_meta(source_file=str(vol_path), checksum=sha256_of(vol_path))
        print(f"volume:  {vol_path}")
    result = judge_session(volume, phantom, profile, unit_id=unit, kind="demo",
                           baselines=baselines_for(hist, unit, phantom.name))
    published = publish(result, volume, out_dir=out, json_path=args.json, history_path=hist,
                        extra_pages=history_pages(hist, result, profile), json_beside=True)
    print_summary(result, published.report, published.json)
    print(f"done in {time.perf_counter() - t0:.0f} s")
    return result.exit_code

