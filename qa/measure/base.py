"""Records every metric family returns, and the registry that lists the families.

A *metric family* is one module under :mod:`qa.measure` (``mtf``, ``asf``, ...). It
registers itself with :func:`register` at import time, declaring the names of the
figures it produces (a name may end in ``*`` for one figure per test object, such as
``sdnr_*``), their units and which way is better. Threshold profiles are checked against
these declarations when they load, so a misspelt metric name is refused before anything
is measured.
"""

from __future__ import annotations

import fnmatch
import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Callable, Mapping

from ..errors import LacunaError

BETTER = ("higher", "lower", "band")


@dataclass(frozen=True)
class Measurement:
    """One reported figure.

    ``value`` is ``None`` when the figure could not be measured; ``note`` then says why.
    ``uncertainty`` is one standard uncertainty (k = 1) in the same unit, or ``None``
    when the data give no estimate of it.
    """

    name: str
    value: float | None
    unit: str
    uncertainty: float | None = None
    note: str = ""

    def __post_init__(self):
        for attr in ("value", "uncertainty"):
            v = getattr(self, attr)
            if v is not None:
                v = float(v)
                object.__setattr__(self, attr, v if math.isfinite(v) else None)
        if self.value is None and not self.note:
            raise LacunaError(f"metric {self.name}: a figure without a value needs a note "
                              "saying why it was not measured")

    @property
    def measured(self) -> bool:
        return self.value is not None

    @classmethod
    def missing(cls, name: str, unit: str, why: str) -> "Measurement":
        return cls(name, None, unit, None, f"not measured: {why}")


@dataclass(frozen=True)
class Roi:
    """A region drawn on the log's overview of the in-focus plane.

    ``kind`` is ``"box"`` (``size_mm`` = width along x, height along y) or ``"circle"``
    (``size_mm`` = diameter, diameter); ``centre_xy_mm`` is in volume coordinates.
    """

    label: str
    kind: str
    centre_xy_mm: tuple[float, float]
    size_mm: tuple[float, float]
    z_mm: float


@dataclass(frozen=True)
class FamilyResult:
    """What one metric family measured on one volume.

    ``plot_data`` holds the arrays the family's own plot function draws (curves, maps);
    it is opaque to the rest of the chain.
    """

    family: str
    measurements: tuple[Measurement, ...]
    rois: tuple[Roi, ...] = ()
    plot_data: Mapping[str, Any] = field(default_factory=dict)
    summary: str = ""

    def __post_init__(self):
        object.__setattr__(self, "measurements", tuple(self.measurements))
        object.__setattr__(self, "rois", tuple(self.rois))
        object.__setattr__(self, "plot_data", MappingProxyType(dict(self.plot_data)))


@dataclass(frozen=True)
class MetricSpec:
    """The declaration of one figure (or one figure per object, when ``name`` ends in *)."""

    name: str
    unit: str
    better: str
    description: str

    def __post_init__(self):
        if self.better not in BETTER:
            raise LacunaError(f"metric {self.name}: 'better' must be one of {BETTER}")

    def matches(self, metric_name: str) -> bool:
        return fnmatch.fnmatchcase(metric_name, self.name)


@dataclass(frozen=True)
class MetricFamily:
    """A registered family: its figures, its measuring function and its plot function.

    ``measure(volume, layout, settings)`` returns a :class:`FamilyResult`;
    ``plot(result)`` returns a matplotlib Figure (or ``None`` when there is nothing
    to draw). ``order`` sorts the families in logs.
    """

    name: str
    title: str
    metrics: tuple[MetricSpec, ...]
    measure: Callable
    plot: Callable | None = None
    order: int = 100


_REGISTRY: dict[str, MetricFamily] = {}


def register(family: MetricFamily) -> MetricFamily:
    """Add a family to the registry (called once by each family module)."""
    if family.name in _REGISTRY and _REGISTRY[family.name].measure is not family.measure:
        raise LacunaError(f"metric family '{family.name}' is registered twice")
    for spec in family.metrics:
        for other in _REGISTRY.values():
            if other.name != family.name and any(s.name == spec.name for s in other.metrics):
                raise LacunaError(f"metric '{spec.name}' is declared by both "
                                  f"'{other.name}' and '{family.name}'")
    _REGISTRY[family.name] = family
    return family


def families() -> tuple[MetricFamily, ...]:
    """Every registered family, in log order."""
    from . import _discover  # noqa: F401  (imports every family module once)
    return tuple(sorted(_REGISTRY.values(), key=lambda f: (f.order, f.name)))


def find_spec(metric_name: str) -> MetricSpec | None:
    """The declaration covering ``metric_name`` (exact names win over patterns)."""
    candidates = [s for f in families() for s in f.metrics]
    for spec in candidates:
        if spec.name == metric_name:
            return spec
    for spec in candidates:
        if spec.matches(metric_name) or fnmatch.fnmatchcase(spec.name, metric_name):
            return spec
    return None
