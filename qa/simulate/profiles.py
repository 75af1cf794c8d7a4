"""Reading acquisition geometry profiles (YAML beside the phantoms, ``phantoms/geometries``)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..yamlio import Fields, load_yaml
from .geometry import MOTIONS, DbtGeometry, Detector
from .sections import SECTION_KINDS, SectionGeometry

KINDS = ("dbt",) + SECTION_KINDS


def read_angles(doc: Fields, key: str = "angles_deg", *, limit: float = 89.0) -> tuple[float, ...]:
    """Angles as a list, or as ``{from, to, views}`` spaced evenly (ends included)."""
    raw = doc.raw(key)
    if isinstance(raw, dict):
        spec = doc.sub(key)
        first = spec.number("from", minimum=-limit, maximum=limit)
        last = spec.number("to", minimum=-limit, maximum=limit)
        views = spec.integer("views", minimum=2)
        spec.reject_unknown()
        if not last > first:
            raise spec.error("to", f"'to' ({last:g}) must be larger than 'from' ({first:g})")
        return tuple(float(a) for a in np.linspace(first, last, views))
    angles = doc.numbers(key)
    if len(angles) < 2 or any(b <= a for a, b in zip(angles, angles[1:])):
        raise doc.error(key, "expected at least two angles in increasing order")
    return angles


def _load_section(doc: Fields, name: str, kind: str, description: str) -> SectionGeometry:
    angles = read_angles(doc, limit=360.0)
    if max(angles) - min(angles) > 360.0 + 1e-9:
        raise doc.error("angles_deg", "an angular range wider than 360° is not a section scan")
    bin_mm = doc.number("bin_mm", positive=True)
    pixel = doc.number("pixel_mm", positive=True)
    plane = doc.number("plane_spacing_mm", 1.0, positive=True)
    noise = doc.sub("noise", {})
    photons = noise.raw("photons_per_bin", None)
    if photons is not None:
        photons = noise.number("photons_per_bin", positive=True)
    noise.reject_unknown()
    r = d = None
    if kind == "section-fan":
        r = doc.number("source_to_centre_mm", positive=True)
        d = doc.number("source_to_detector_mm", positive=True)
        if d <= r:
            raise doc.error("source_to_detector_mm", f"must exceed source_to_centre_mm ({r:g})")
    notes = doc.raw("notes", [])
    doc.reject_unknown()
    return SectionGeometry(name, description, kind, angles, bin_mm, pixel, plane, photons, r, d,
                           tuple(notes))


def load_geometry(path) -> DbtGeometry | SectionGeometry:
    """Read a geometry profile: a DBT unit, or a parallel- or fan-beam section scanner.

    Raises
    ------
    InputError
        Unknown or missing fields, bad numbers, a detector that is not a whole number
        of pixels.
    """
    path = Path(path)
    doc = Fields(load_yaml(path), str(path))
    name = doc.text("geometry")
    kind = doc.choice("kind", KINDS)
    description = doc.text("description", "")
    if kind in SECTION_KINDS:
        return _load_section(doc, name, kind, description)
    sid = doc.number("source_to_image_mm", positive=True)
    pivot = doc.number("pivot_height_mm", 0.0, minimum=0.0)
    if pivot >= sid:
        raise doc.error("pivot_height_mm", f"must be below the source ({sid:g} mm)")
    angles = read_angles(doc)
    motion = doc.choice("motion", MOTIONS, "step-and-shoot")
    sweep = doc.number("sweep_deg", 0.0, minimum=0.0)
    motion_samples = doc.integer("motion_samples", 1, minimum=1)
    if motion == "step-and-shoot" and sweep > 0:
        raise doc.error("sweep_deg", "a step-and-shoot unit does not move during an exposure; "
                        "use motion: continuous or sweep_deg: 0")
    focal = doc.number("focal_spot_mm", 0.0, minimum=0.0)
    focal_samples = doc.integer("focal_samples", 1, minimum=1)
    det = doc.sub("detector")
    pitch = det.number("pitch_mm", positive=True)
    size = det.vector("size_mm", 2, positive=True)
    corner = det.vector("corner_xy_mm", 2)
    fill = det.number("fill_factor", 1.0, positive=True, maximum=1.0)
    aperture = det.integer("aperture_samples", 2, minimum=1)
    blur = det.number("blur_sd_mm", 0.0, minimum=0.0)
    det.reject_unknown()
    counts = [s / pitch for s in size]
    if any(abs(c - round(c)) > 1e-6 for c in counts):
        raise det.error("size_mm", f"must be a whole number of pixels of {pitch:g} mm, "
                        f"got {size[0]:g} x {size[1]:g} mm")
    columns, rows = (int(round(c)) for c in counts)
    detector = Detector(pitch, columns, rows,
                        (corner[0] + pitch / 2.0, corner[1] + pitch / 2.0), fill, blur)
    noise = doc.sub("noise", {})
    photons = noise.raw("photons_per_pixel", None)
    if photons is not None:
        photons = noise.number("photons_per_pixel", positive=True)
    electronic = noise.number("electronic_sd", 0.0, minimum=0.0)
    noise.reject_unknown()
    plane = doc.number("plane_spacing_mm", 1.0, positive=True)
    source_y = doc.number("source_y_mm", 0.0)
    notes = doc.raw("notes", [])
    if not isinstance(notes, list) or not all(isinstance(n, str) for n in notes):
        raise doc.error("notes", "expected a list of texts")
    doc.reject_unknown()
    return DbtGeometry(name, description, sid, pivot, angles, detector, motion, sweep,
                       motion_samples, focal, focal_samples, aperture, photons, electronic,
                       plane, source_y, tuple(notes))

