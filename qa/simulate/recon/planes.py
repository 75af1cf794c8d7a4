"""Computing a reconstruction plane by plane on a few threads."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from typing import Callable

import numpy as np

from ...parallel import workers


def by_plane(plane: Callable[[float], np.ndarray], grid) -> np.ndarray:
    """Stack ``plane(z)`` for every plane height of ``grid`` into a float32 volume.

    Planes are independent, and numpy releases the GIL in its kernels, so a few threads
    share the work (``qa.parallel.workers()``).
    """
    out = np.empty(grid.shape, dtype=np.float32)

    def fill(k: int) -> None:
        out[k] = plane(float(grid.z_mm[k]))

    with ThreadPoolExecutor(max_workers=workers()) as pool:
        list(pool.map(fill, range(grid.shape[0])))
    return out
