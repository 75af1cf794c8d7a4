"""The data model of a phantom: shapes, test objects and the phantom itself.

Positions here are world coordinates ``(x, y, z)`` in mm (named ``*_xyz_mm``); only
volume arrays use the ``[z, y, x]`` order. A shape's ``rotation`` maps its local axes to
world axes: ``p_world = centre + rotation @ p_local``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

SHAPES = ("sphere", "ellipsoid", "cylinder", "box")
ROLES = ("background", "bead", "edge", "disk", "uniform", "marker", "insert")


def rotation_matrix(rotation_deg) -> np.ndarray:
    """Rotation about world x, then world y, then world z (angles in degrees)."""
    rx, ry, rz = np.radians(np.asarray(rotation_deg, dtype=float))
    cx, sx, cy, sy, cz, sz = np.cos(rx), np.sin(rx), np.cos(ry), np.sin(ry), np.cos(rz), np.sin(rz)
    mx = np.array([[1, 0, 0], [0, cx, -sx], [0, sx, cx]])
    my = np.array([[cy, 0, sy], [0, 1, 0], [-sy, 0, cy]])
    mz = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1]])
    return mz @ my @ mx


@dataclass(frozen=True)
class Shape:
    """A solid: ``ellipsoid`` (spheres too), ``cylinder`` (axis along local z) or ``box``.

    ``half_xyz_mm`` holds the semi-axes of an ellipsoid, the half sizes of a box, and
    ``(radius, radius, height / 2)`` of a cylinder.
    """

    kind: str
    centre_xyz_mm: tuple[float, float, float]
    half_xyz_mm: tuple[float, float, float]
    rotation_deg: tuple[float, float, float] = (0.0, 0.0, 0.0)

    @property
    def rotation(self) -> np.ndarray:
        return rotation_matrix(self.rotation_deg)

    @property
    def bounding_radius_mm(self) -> float:
        return float(np.linalg.norm(self.half_xyz_mm)) if self.kind != "ellipsoid" \
            else float(max(self.half_xyz_mm))

    def contains(self, points_xyz: np.ndarray) -> np.ndarray:
        """Boolean mask of the points ``(..., 3)`` inside the solid."""
        p = (np.asarray(points_xyz, dtype=float) - self.centre_xyz_mm) @ self.rotation
        h = np.asarray(self.half_xyz_mm)
        if self.kind == "ellipsoid":
            return np.sum((p / h) ** 2, axis=-1) <= 1.0
        if self.kind == "cylinder":
            return ((p[..., 0] ** 2 + p[..., 1] ** 2) <= h[0] ** 2) & (np.abs(p[..., 2]) <= h[2])
        return np.all(np.abs(p) <= h, axis=-1)

    def moved(self, centre_xyz_mm, extra_rotation_z_deg: float = 0.0) -> "Shape":
        rx, ry, rz = self.rotation_deg
        return Shape(self.kind, tuple(float(c) for c in centre_xyz_mm), self.half_xyz_mm,
                     (rx, ry, rz + extra_rotation_z_deg))


@dataclass(frozen=True)
class PhantomObject:
    """One object of a phantom definition.

    ``mu_per_mm`` is the linear attenuation at the phantom's effective energy
    (``None`` for a region that is only a place to measure, such as a uniform area).
    ``line`` is where the object starts in its YAML file, for messages.
    """

    id: str
    role: str
    shape: Shape
    material: str | None
    mu_per_mm: float | None
    line: int = 0
    description: str = ""


@dataclass(frozen=True)
class Phantom:
    """A phantom definition: test objects in phantom coordinates, one of them the background."""

    name: str
    description: str
    energy_keV: float
    objects: tuple[PhantomObject, ...]
    source: str = ""
    analysis: Mapping = field(default_factory=dict)
    #: ``((x0, x1), (y0, y1), (z0, z1))`` in mm: the region a simulation reconstructs.
    field_xyz_mm: tuple | None = None
    #: Height (mm) at which a simulation's voxel pitch equals the detector pitch
    #: demagnified (``None``: the detector pitch itself).
    reference_z_mm: float | None = None

    def __post_init__(self):
        object.__setattr__(self, "objects", tuple(self.objects))
        object.__setattr__(self, "analysis", MappingProxyType(dict(self.analysis)))

    @property
    def background(self) -> PhantomObject | None:
        for obj in self.objects:
            if obj.role == "background":
                return obj
        return None

    def with_role(self, role: str) -> tuple[PhantomObject, ...]:
        return tuple(o for o in self.objects if o.role == role)

    def get(self, object_id: str) -> PhantomObject:
        for obj in self.objects:
            if obj.id == object_id:
                return obj
        raise KeyError(object_id)

    def attenuating(self) -> tuple[tuple[PhantomObject, float], ...]:
        """Objects that attenuate, each with its attenuation *added* to the background.

        The background's own value is absolute (air outside); every other object is
        assumed to lie inside the background and replaces it, so it adds
        ``mu - mu_background`` along its chord. Objects must not overlap each other
        (checked when a definition loads).
        """
        bg = self.background
        mu_bg = bg.mu_per_mm if bg is not None and bg.mu_per_mm is not None else 0.0
        out = []
        for obj in self.objects:
            if obj.mu_per_mm is None:
                continue
            delta = obj.mu_per_mm if obj is bg else obj.mu_per_mm - mu_bg
            if delta != 0.0:
                out.append((obj, float(delta)))
        return tuple(out)
