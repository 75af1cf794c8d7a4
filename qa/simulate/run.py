"""The simulator end to end: phantom + geometry -> projections -> reconstruction."""

from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError
from ..phantom.model import Phantom
from ..volume import Volume
from .acquire import Projections, simulate_projections
from .geometry import DbtGeometry
from .recon import reconstruct
from .recon.grid import ReconGrid


def grid_for(phantom: Phantom, geometry: DbtGeometry) -> ReconGrid:
    """The reconstruction grid: the phantom's field and the geometry's plane spacing.

    The voxel pitch is the detector pitch, or, when the phantom states a
    ``reference_z`` (the height of its test objects), the detector pitch demagnified to
    that height, ``pitch (SID - z) / SID``. Then a voxel row of that plane maps onto a
    detector row in the central view (and within a fraction of a pixel in the others,
    whose source lies on the same line y = 0), and the linear interpolation of the backprojection
    blurs every position alike instead of by an amount that beats along the image (a
    0.1 mm pitch kept at magnification 1.03 gives MTF50 between 3 and 7 lp/mm along y
    depending on where an edge lies).
    """
    if phantom.field_xyz_mm is None:
        raise InputError("the phantom definition has no 'field_mm' (the region to "
                         "reconstruct)", source=phantom.source, field="field_mm")
    x, y, z = phantom.field_xyz_mm
    pitch = geometry.detector.pitch_mm
    if phantom.reference_z_mm is not None:
        sid = geometry.source_to_image_mm
        pitch *= (sid - phantom.reference_z_mm) / sid
    return ReconGrid.from_field(x, y, z, pixel_mm=pitch, plane_mm=geometry.plane_spacing_mm)


@dataclass(frozen=True)
class Simulation:
    projections: Projections
    volume: Volume
    grid: ReconGrid


def simulate(phantom: Phantom, geometry: DbtGeometry, *, recon: str = "fbp", seed: int = 0,
             noise: bool = True, progress: bool = False, meta: dict | None = None,
             recon_options: dict | None = None) -> Simulation:
    """Simulate an acquisition of ``phantom`` and reconstruct it."""
    grid = grid_for(phantom, geometry)
    projections = simulate_projections(phantom, geometry, seed=seed, noise=noise,
                                       progress=progress)
    info = {"simulated": "yes", "phantom": phantom.name, "seed": seed if noise else None}
    info.update(meta or {})
    volume = reconstruct(projections, grid, method=recon, meta=info, **(recon_options or {}))
    return Simulation(projections, volume, grid)
