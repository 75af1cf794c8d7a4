"""``lacuna demo``: the whole chain on a bundled digital phantom, in about a minute.

The scenario is invented: the Fenmoor Breast Screening Service (fictional) checks its
static tomosynthesis unit FEN-DBT-1 with Lacuna's digital phantom "Tern".
"""

from __future__ import annotations

import datetime as dt
import time
from pathlib import Path

from .. import PROJECT_ROOT
from ..fileio import sha256_of
from ..io import write_dicom
from ..judge import load_profile
from ..phantom import load_phantom
from ..publish import baselines_for, publish
from ..session import judge_session
from ..simulate.profiles import load_geometry
from ..simulate.run import simulate
from .common import add_output_options, history_path, print_summary

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
GEOMETRY = PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml"
PROFILE = PROJECT_ROOT / "thresholds" / "demo.yaml"

#: The fictional unit of the demo (invented scenario).
DEMO_UNIT = {"manufacturer": "Lacuna simulator", "model": "virtual DBT, mid arc",
             "serial": "FEN-DBT-1", "station": "FENMOOR-DBT1",
             "site": "Fenmoor Breast Screening Service (fictional)", "software": "sim 1.0"}


def add_parser(sub) -> None:
    p = sub.add_parser("demo", help="run the whole chain on the bundled digital phantom",
                       description="Simulate a DBT acquisition of Lacuna's digital phantom, "
                       "reconstruct it, measure, judge, record and write the dated PDF log.")
    p.add_argument("--recon", default="fbp", help="reconstruction method (default: fbp)")
    p.add_argument("--seed", type=int, default=2026, help="noise seed (default: 2026)")
    p.add_argument("--no-volume", action="store_true",
                   help="do not write the reconstructed volume as DICOM beside the log")
    add_output_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    t0 = time.perf_counter()
    phantom = load_phantom(PHANTOM)
    geometry = load_geometry(GEOMETRY)
    profile = load_profile(PROFILE)
    today = dt.date.today().isoformat()
    meta = dict(DEMO_UNIT, acquired=today)
    print(f"simulating {geometry.name} ({geometry.n_views} views, ±{geometry.half_arc_deg:g}°) "
          f"of phantom {phantom.name} ...")
    sim = simulate(phantom, geometry, recon=args.recon, seed=args.seed, progress=True, meta=meta)
    volume = sim.volume
    out = Path(args.out)
    if not args.no_volume:
        vol_path = out / f"{today}_{DEMO_UNIT['serial']}_volume.dcm"
        write_dicom(volume, vol_path)
        volume = volume.with_meta(source_file=str(vol_path), checksum=sha256_of(vol_path))
        print(f"volume:  {vol_path}")
    hist = history_path(args)
    result = judge_session(volume, phantom, profile, unit_id=DEMO_UNIT["serial"],
                           baselines=baselines_for(hist, DEMO_UNIT["serial"], phantom.name),
                           kind="demo")
    json_path = args.json or out / f"{result.date}_{result.unit_id}_{profile.name}.json"
    published = publish(result, volume, out_dir=out, json_path=json_path, history_path=hist)
    print_summary(result, published.report, published.json)
    print(f"done in {time.perf_counter() - t0:.0f} s")
    return result.exit_code
