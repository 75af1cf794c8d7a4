"""Where the phantom's test objects are in a volume: the output of the location stage."""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

from ..phantom.model import Phantom, PhantomObject, Shape


@dataclass(frozen=True)
class Pose:
    """The phantom's pose in the volume: in-plane shift, rotation about z, mirroring.

    ``residual_mm`` is the RMS distance between the found and the posed nominal
    positions of the objects used to fit the pose (0 when nothing was fitted; NaN when
    a fit was tried and failed, ``note`` then says why and the nominal pose is used).
    ``shift_z_mm`` is the height offset applied to every object's nominal height (the
    beads' mean height error when it is significant, else 0). The convention (rotation
    about the phantom's origin, mirroring reverses x) is in :mod:`qa.locate.pose`.
    """

    shift_xy_mm: tuple[float, float] = (0.0, 0.0)
    rotation_deg: float = 0.0
    mirrored: bool = False
    residual_mm: float = 0.0
    fitted_from: tuple[str, ...] = ()
    shift_z_mm: float = 0.0
    note: str = ""


@dataclass(frozen=True)
class Placed:
    """One test object as found in the volume.

    ``shape`` is the object's nominal shape moved to where it was found, in volume
    coordinates (mm). ``found`` is False when the object was not seen near its expected
    place; ``note`` then says so and metrics that need it report "not measured".
    """

    obj: PhantomObject
    shape: Shape
    found: bool = True
    note: str = ""

    @property
    def id(self) -> str:
        return self.obj.id

    @property
    def centre_xyz_mm(self) -> tuple[float, float, float]:
        return self.shape.centre_xyz_mm


@dataclass(frozen=True)
class Layout:
    """Every test object of a phantom, placed in one volume."""

    phantom: Phantom
    placed: Mapping[str, Placed]
    pose: Pose = field(default_factory=Pose)

    def __post_init__(self):
        object.__setattr__(self, "placed", MappingProxyType(dict(self.placed)))

    def with_role(self, role: str) -> tuple[Placed, ...]:
        return tuple(p for p in self.placed.values() if p.obj.role == role)

    def analysis(self, family: str) -> Mapping:
        """The phantom's analysis options for one metric family (may be empty)."""
        return self.phantom.analysis.get(family, {}) or {}
