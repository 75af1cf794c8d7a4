"""Shift-and-add reconstruction (Niklason et al., Radiology 205, 1997).

Each plane is the average over views of the projections shifted and scaled so that
objects at the plane's height line up: ``f(x, y, z) = 1/n(x,y,z) Σ_i p_i(u_i, v_i)`` where
``(u_i, v_i)`` is the projection of ``(x, y, z)`` from source ``i`` and ``n`` counts the
views whose detector sees the point.
"""

from __future__ import annotations

import numpy as np

from ..acquire import Projections
from . import register
from .grid import ReconGrid, plane_taps, sample
from .planes import by_plane


@register("saa", "shift-and-add (Niklason et al. 1997)")
def shift_and_add(projections: Projections, grid: ReconGrid) -> np.ndarray:
    g = projections.geometry
    sources = g.nominal_sources()

    def plane(z: float) -> np.ndarray:
        acc = np.zeros(grid.shape[1:])
        count = np.zeros(grid.shape[1:])
        for i, src in enumerate(sources):
            cols, rows = plane_taps(src, z, grid, g.detector)
            acc += sample(projections.data[i], cols, rows)
            count += rows.valid[:, None] & cols.valid[None, :]
        return acc / np.maximum(count, 1)

    return by_plane(plane, grid)
