"""``lacuna simulate``: a digital phantom through a geometry profile and a reconstruction."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..fileio import atomic_path, write_text_atomic
from ..io import write_dicom, write_npz
from ..phantom import load_phantom
from ..simulate.profiles import load_geometry
from ..simulate.recon import methods
from ..simulate.run import simulate
from ..simulate.sections import SectionGeometry, simulate_sections
from ..simulate.voxelise import voxelise
from .common import existing_file


def add_parser(sub) -> None:
    p = sub.add_parser("simulate", help="simulate an acquisition and reconstruct it",
                       description="Project PHANTOM with exact line integrals over the "
                       "geometry's arc, add noise, reconstruct, and write the volume, the "
                       "projections and (on request) the ground truth.")
    p.add_argument("phantom", metavar="PHANTOM", help="phantom definition (YAML)")
    p.add_argument("--geometry", metavar="FILE", required=True, help="geometry profile (YAML)")
    p.add_argument("--recon", metavar="NAME", default="fbp",
                   help=f"reconstruction: {', '.join(methods())} for DBT; fbp or sirt for "
                        "parallel-beam sections, fbp for fan beam (default: fbp)")
    p.add_argument("--out", metavar="DIR", required=True, help="folder for the results")
    p.add_argument("--format", choices=("dicom", "npz"), default="dicom",
                   help="file format of the reconstruction (default: dicom)")
    p.add_argument("--seed", type=int, default=0, help="noise seed (default: 0)")
    p.add_argument("--noiseless", action="store_true", help="no quantum or electronic noise")
    p.add_argument("--truth", action="store_true",
                   help="also write the voxelised ground truth (attenuation, 1/mm) as .npz")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def _run_sections(args, phantom, geometry) -> int:
    sim = simulate_sections(phantom, geometry, recon=args.recon, seed=args.seed,
                            noise=not args.noiseless)
    out = Path(args.out)
    stem = f"{phantom.name}_{geometry.name}_{args.recon}"
    write = write_dicom if args.format == "dicom" else write_npz
    recon_path = write(sim.volume, out / f"{stem}.{'dcm' if args.format == 'dicom' else 'npz'}")
    sino_path = out / f"{phantom.name}_{geometry.name}_sinograms.npy"
    with atomic_path(sino_path) as tmp:
        with open(tmp, "wb") as fh:
            np.save(fh, sim.sinograms)
    g = geometry
    write_text_atomic(sino_path.with_suffix(".geometry.json"), json.dumps({
        "geometry": g.name, "kind": g.kind, "angles_deg": list(g.angles_deg),
        "bin_mm": g.bin_mm, "source_to_centre_mm": g.source_centre_mm,
        "source_to_detector_mm": g.source_detector_mm,
        "photons_per_bin": None if args.noiseless else g.photons_per_bin,
        "seed": None if args.noiseless else args.seed,
        "array": "planes x views x bins, line integrals; bins centred on the field's centre"},
        indent=2) + "\n")
    print(f"reconstruction: {recon_path}")
    print(f"sinograms:      {sino_path}")
    if args.truth:
        from ..simulate.recon.grid import ReconGrid
        grid = ReconGrid.from_field(*phantom.field_xyz_mm, pixel_mm=g.pixel_mm,
                                    plane_mm=g.plane_spacing_mm)
        truth = write_npz(voxelise(phantom, grid), out / f"{phantom.name}_truth.npz")
        print(f"ground truth:   {truth}")
    return 0


def run(args) -> int:
    phantom = load_phantom(existing_file(args.phantom, "phantom definition"))
    geometry = load_geometry(existing_file(args.geometry, "geometry profile"))
    if isinstance(geometry, SectionGeometry):
        return _run_sections(args, phantom, geometry)
    if args.recon not in methods():
        from ..errors import InputError
        raise InputError(f"unknown reconstruction '{args.recon}'; known: "
                         f"{', '.join(methods())}", field="--recon")
    sim = simulate(phantom, geometry, recon=args.recon, seed=args.seed,
                   noise=not args.noiseless, progress=not args.quiet)
    out = Path(args.out)
    stem = f"{phantom.name}_{geometry.name}_{args.recon}"
    if args.format == "dicom":
        recon_path = write_dicom(sim.volume, out / f"{stem}.dcm")
    else:
        recon_path = write_npz(sim.volume, out / f"{stem}.npz")
    proj_path = out / f"{phantom.name}_{geometry.name}_projections.npy"
    with atomic_path(proj_path) as tmp:
        with open(tmp, "wb") as fh:
            np.save(fh, sim.projections.data)
    g = geometry
    write_text_atomic(proj_path.with_suffix(".geometry.json"), json.dumps({
        "geometry": g.name, "source_to_image_mm": g.source_to_image_mm,
        "pivot_height_mm": g.pivot_height_mm, "angles_deg": list(g.angles_deg),
        "source_y_mm": g.source_y_mm, "motion": g.motion, "sweep_deg": g.sweep_deg,
        "detector": {"pitch_mm": g.detector.pitch_mm, "columns": g.detector.columns,
                     "rows": g.detector.rows,
                     "first_centre_xy_mm": list(g.detector.first_centre_xy_mm)},
        "photons_per_pixel": None if args.noiseless else g.photons_per_pixel,
        "seed": None if args.noiseless else args.seed,
        "array": "views x rows (y) x columns (x), values -ln(N/N0)"}, indent=2) + "\n")
    print(f"reconstruction: {recon_path}")
    print(f"projections:    {proj_path}")
    if args.truth:
        truth = write_npz(voxelise(phantom, sim.grid), out / f"{phantom.name}_truth.npz")
        print(f"ground truth:   {truth}")
    return 0
