"""Reference reconstructions of simulated DBT projections: a registry of methods.

Each method is a function ``method(projections, grid, **options) -> ndarray (nz, ny, nx)``
registered under a name; :func:`reconstruct` runs one and wraps the result as a
:class:`~qa.volume.Volume` carrying the geometry it came from.
"""

from __future__ import annotations

from typing import Callable

from ...errors import InputError
from ...volume import Volume
from ..acquire import Projections
from .grid import ReconGrid

_METHODS: dict[str, tuple[Callable, str]] = {}


def register(name: str, description: str):
    def wrap(fn):
        _METHODS[name] = (fn, description)
        return fn
    return wrap


def methods() -> dict[str, str]:
    """Registered reconstruction names and their one-line descriptions."""
    from . import fbp, saa, sart, tv  # noqa: F401  (each module registers itself)
    return {k: v[1] for k, v in sorted(_METHODS.items())}


def reconstruct(projections: Projections, grid: ReconGrid, *, method: str = "fbp",
                meta: dict | None = None, **options) -> Volume:
    """Reconstruct ``projections`` on ``grid`` with a registered ``method``."""
    known = methods()
    if method not in known:
        raise InputError(f"unknown reconstruction '{method}'; known: {', '.join(known)}",
                         field="recon")
    fn = _METHODS[method][0]
    data = fn(projections, grid, **options)
    g = projections.geometry
    info = {"reconstruction": method, "geometry": g.name, "views": g.n_views,
            "half_arc_deg": round(g.half_arc_deg, 6), "source_to_image_mm": g.source_to_image_mm,
            "angles_deg": [round(a, 6) for a in g.angles_deg], "motion": g.motion}
    info.update(meta or {})
    return Volume(data, grid.spacing_mm, grid.origin_mm, info)


__all__ = ["ReconGrid", "reconstruct", "methods", "register"]
