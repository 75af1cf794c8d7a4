"""Reading and checking phantom definitions (YAML under ``phantoms/``).

The format is described in ``README.md`` ("Writing a phantom definition"). Every error
names the file, the line and the field.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError
from ..yamlio import Fields, load_yaml
from .materials import linear_attenuation
from .model import ROLES, SHAPES, Phantom, PhantomObject, Shape

#: The shape each role must have (None: any shape).
_ROLE_SHAPES = {"background": ("box", "cylinder"), "bead": ("sphere", "ellipsoid"),
                "edge": ("box",), "disk": ("cylinder",), "uniform": ("box", "cylinder"),
                "marker": None, "insert": None}


def load_phantom(path) -> Phantom:
    """Read a phantom definition and check it.

    Raises
    ------
    InputError
        For any unknown field, object type or role, a missing field, a bad number,
        an unknown material, overlapping objects, or an object outside the background.
    """
    path = Path(path)
    doc = Fields(load_yaml(path), str(path))
    name = doc.text("phantom")
    description = doc.text("description", "")
    energy = doc.number("energy_keV", positive=True, maximum=200.0)
    analysis = doc.raw("analysis", {})
    if not isinstance(analysis, dict):
        raise doc.error("analysis", "expected a mapping of analysis options per metric family")
    field_xyz = reference_z = None
    if doc.has("field_mm"):
        fd = doc.sub("field_mm")
        field_xyz = []
        for axis in ("x", "y", "z"):
            lo, hi = fd.vector(axis, 2)
            if not hi > lo:
                raise fd.error(axis, f"expected [low, high] with high > low, got [{lo:g}, {hi:g}]")
            field_xyz.append((lo, hi))
        reference_z = fd.number("reference_z", None)
        fd.reject_unknown()
        field_xyz = tuple(field_xyz)
    objects = []
    seen = {}
    for item in doc.items("objects"):
        obj = _read_object(item, energy)
        if obj.id in seen:
            raise item.error("id", f"object id '{obj.id}' is already used on line {seen[obj.id]}")
        seen[obj.id] = obj.line
        objects.append(obj)
    doc.reject_unknown()
    phantom = Phantom(name, description, energy, tuple(objects), str(path), analysis, field_xyz,
                      reference_z)
    _check_arrangement(phantom, doc)
    return phantom


def _read_object(item: Fields, energy_keV: float) -> PhantomObject:
    oid = item.text("id")
    role = item.choice("role", ROLES)
    kind = item.choice("shape", SHAPES)
    allowed = _ROLE_SHAPES[role]
    if allowed is not None and kind not in allowed:
        raise item.error("shape", f"a {role} must be a {' or '.join(allowed)}, got {kind}")
    centre = item.vector("centre_mm", 3)
    rotation = item.vector("rotation_deg", 3, (0.0, 0.0, 0.0))
    if kind == "sphere":
        r = item.number("radius_mm", positive=True)
        half = (r, r, r)
    elif kind == "ellipsoid":
        half = item.vector("semi_axes_mm", 3, positive=True)
    elif kind == "cylinder":
        r = item.number("radius_mm", positive=True)
        half = (r, r, item.number("height_mm", positive=True) / 2.0)
    else:
        size = item.vector("size_mm", 3, positive=True)
        half = tuple(s / 2.0 for s in size)
    shape = Shape("ellipsoid" if kind == "sphere" else kind, centre, half, rotation)
    material = item.raw("material", None)
    mu = item.raw("mu_per_mm", None)
    if role == "uniform":
        if material is not None or mu is not None:
            raise item.error("material", "a uniform region is a place to measure; "
                             "it takes neither 'material' nor 'mu_per_mm'")
        mu_value = None
    elif (material is None) == (mu is None):
        raise item.error(None, f"object '{oid}' needs exactly one of 'material' or 'mu_per_mm'")
    elif material is not None:
        item.text("material")
        try:
            mu_value = linear_attenuation(material, energy_keV)
        except InputError as exc:
            raise item.error("material", exc.message) from None
    else:
        mu_value = item.number("mu_per_mm", minimum=0.0)
    description = item.text("description", "")
    item.reject_unknown()
    return PhantomObject(oid, role, shape, material, mu_value, item.line() or 0, description)


def _sample_points(shape: Shape, n: int = 9) -> np.ndarray:
    """Points of a regular grid over the shape's bounding box that lie inside it."""
    h = np.asarray(shape.half_xyz_mm)
    t = np.linspace(-1.0, 1.0, n)
    local = np.stack(np.meshgrid(t, t, t, indexing="ij"), axis=-1).reshape(-1, 3) * h
    world = local @ shape.rotation.T + shape.centre_xyz_mm
    return world[shape.contains(world)]


def _check_arrangement(phantom: Phantom, doc: Fields) -> None:
    backgrounds = phantom.with_role("background")
    if len(backgrounds) > 1:
        raise InputError(f"only one background object is allowed, found "
                         f"{', '.join(o.id for o in backgrounds)}", source=phantom.source,
                         line=backgrounds[1].line, field="objects")
    bg = backgrounds[0] if backgrounds else None
    solids = [o for o in phantom.objects if o.role != "background" and o.mu_per_mm is not None]
    for obj in phantom.objects:
        if obj is bg or bg is None:
            continue
        pts = _sample_points(obj.shape)
        if len(pts) and not np.all(bg.shape.contains(pts)):
            raise InputError(f"object '{obj.id}' reaches outside the background '{bg.id}'",
                             source=phantom.source, line=obj.line, field="centre_mm")
    for i, a in enumerate(solids):
        for b in solids[i + 1:]:
            gap = np.linalg.norm(np.subtract(a.shape.centre_xyz_mm, b.shape.centre_xyz_mm))
            if gap > a.shape.bounding_radius_mm + b.shape.bounding_radius_mm:
                continue
            if np.any(b.shape.contains(_sample_points(a.shape, 13))):
                raise InputError(f"objects '{a.id}' and '{b.id}' overlap; attenuation of "
                                 "overlapping objects is not defined", source=phantom.source,
                                 line=b.line, field="centre_mm")
