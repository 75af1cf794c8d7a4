"""Limited-arc CT sections: a stack of 2-D sections of a phantom, simulated and rebuilt.

Each plane of the phantom's field is cut through its solids (which must stand upright:
turned about z only) to give 2-D primitives, whose exact line integrals
(:mod:`qa.simulate.exact2d`) over the geometry's angular range form the plane's
sinogram; Poisson noise is added when the profile states a photon count, and the plane
is reconstructed by parallel-beam FBP or SIRT (:mod:`qa.simulate.section2d`) or by
fan-beam FBP (:mod:`qa.simulate.fan2d`). The section frame has its origin at the
field's centre; the volume keeps world coordinates.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..phantom.model import Phantom
from ..volume import Volume
from .exact2d import ellipse, parallel_integrals, rectangle
from .fan2d import FanBeam, exact_fan_sinogram, fbp_fan, sirt_fan
from .section2d import reconstruct_section

SECTION_KINDS = ("section-parallel", "section-fan")
SECTION_RECONS = {"section-parallel": ("fbp", "sirt"), "section-fan": ("fbp", "sirt")}


@dataclass(frozen=True)
class SectionGeometry:
    """A limited-arc section scanner (parallel or flat-detector fan beam)."""

    name: str
    description: str
    kind: str
    angles_deg: tuple[float, ...]
    bin_mm: float
    pixel_mm: float
    plane_spacing_mm: float
    photons_per_bin: float | None = None
    source_centre_mm: float | None = None
    source_detector_mm: float | None = None
    notes: tuple[str, ...] = ()

    @property
    def n_views(self) -> int:
        return len(self.angles_deg)

    @property
    def half_arc_deg(self) -> float:
        return 0.5 * (max(self.angles_deg) - min(self.angles_deg))


def cross_sections(phantom: Phantom, z_mm: float, centre_xy_mm) -> list:
    """The phantom's solids cut at height ``z_mm``, as 2-D primitives in the section frame.

    Raises
    ------
    InputError
        When a solid is tilted (turned about x or y): its cut is not a primitive.
    """
    out = []
    cx0, cy0 = centre_xy_mm
    for obj, delta in phantom.attenuating():
        sh = obj.shape
        rx, ry, rz = sh.rotation_deg
        if abs(rx) > 1e-9 or abs(ry) > 1e-9:
            raise InputError(f"object '{obj.id}' is tilted; section simulation takes "
                             "solids turned about z only", source=phantom.source,
                             line=obj.line, field="rotation_deg")
        x, y, z = sh.centre_xyz_mm
        a, b, c = sh.half_xyz_mm
        d = z_mm - z
        if abs(d) >= c:
            continue
        centre = (x - cx0, y - cy0)
        if sh.kind == "ellipsoid":
            s = np.sqrt(1.0 - (d / c) ** 2)
            out.append(ellipse(centre, (a * s, b * s), rotation_deg=rz, value_per_mm=delta))
        elif sh.kind == "cylinder":
            out.append(ellipse(centre, (a, a), value_per_mm=delta))
        else:
            out.append(rectangle(centre, (2 * a, 2 * b), rotation_deg=rz, value_per_mm=delta))
    return out


def _noisy(sinogram: np.ndarray, photons: float | None, rng) -> np.ndarray:
    if photons is None:
        return sinogram
    counts = rng.poisson(photons * np.exp(-sinogram)).astype(float)
    return -np.log(np.maximum(counts, 0.5) / photons)


@dataclass(frozen=True)
class SectionSimulation:
    """The reconstructed stack and the (noisy) sinograms ``(planes, views, bins)``."""

    volume: Volume
    sinograms: np.ndarray


def simulate_sections(phantom: Phantom, geometry: SectionGeometry, *, recon: str = "fbp",
                      seed: int | None = 0, noise: bool = True) -> SectionSimulation:
    """Simulate and reconstruct every section of the phantom's field.

    The volume is ``[z, y, x]`` in attenuation units (1/mm) with the geometry's facts in
    its metadata.
    """
    if recon not in SECTION_RECONS[geometry.kind]:
        raise InputError(f"reconstruction '{recon}' is not available for {geometry.kind} "
                         f"geometries; known: {', '.join(SECTION_RECONS[geometry.kind])}",
                         field="--recon")
    if phantom.field_xyz_mm is None:
        raise InputError("the phantom definition has no 'field_mm' (the region to "
                         "reconstruct)", source=phantom.source, field="field_mm")
    (x0, x1), (y0, y1), (z0, z1) = phantom.field_xyz_mm
    p = geometry.pixel_mm
    nx, ny = int(round((x1 - x0) / p)), int(round((y1 - y0) / p))
    nz = max(1, int(round((z1 - z0) / geometry.plane_spacing_mm)))
    z = z0 + geometry.plane_spacing_mm * (np.arange(nz) + 0.5)
    centre = ((x0 + x1) / 2, (y0 + y1) / 2)
    rng = np.random.default_rng(seed)
    photons = geometry.photons_per_bin if noise else None
    half_diag = 0.5 * np.hypot(nx, ny) * p
    n_bins = 2 * int(np.ceil(half_diag / geometry.bin_mm)) + 1
    t = geometry.bin_mm * (np.arange(n_bins) - n_bins // 2)
    out = np.empty((nz, ny, nx), np.float32)
    sinograms = []
    fan = None
    if geometry.kind == "section-fan":
        fan = FanBeam(shape=(ny, nx), pixel_mm=p, angles_deg=np.asarray(geometry.angles_deg),
                      source_centre_mm=geometry.source_centre_mm,
                      source_detector_mm=geometry.source_detector_mm, det_mm=geometry.bin_mm)
    for k, zk in enumerate(z):
        objects = cross_sections(phantom, float(zk), centre)
        if fan is None:
            sino = _noisy(parallel_integrals(objects, angles_deg=geometry.angles_deg, t_mm=t,
                                             aperture_mm=geometry.bin_mm), photons, rng)
            out[k] = reconstruct_section(sino, angles_deg=geometry.angles_deg, pixel_mm=p,
                                         shape=(ny, nx), method=recon, det_mm=geometry.bin_mm)
        else:
            sino = _noisy(exact_fan_sinogram(objects, fan), photons, rng)
            out[k] = fbp_fan(sino, fan) if recon == "fbp" else sirt_fan(sino, fan)[0]
        sinograms.append(sino.astype(np.float32))
    meta = {"simulated": "yes", "phantom": phantom.name, "geometry": geometry.name,
            "reconstruction": recon, "views": geometry.n_views,
            "half_arc_deg": round(geometry.half_arc_deg, 6),
            "seed": seed if photons is not None else None, "unit_of_value": "1/mm"}
    origin = (float(z[0]), y0 + p / 2, x0 + p / 2)
    return SectionSimulation(Volume(out, (geometry.plane_spacing_mm, p, p), origin, meta),
                             np.stack(sinograms))
