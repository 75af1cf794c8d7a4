"""Timing shared by the benchmark scripts (imported from beside them; not a benchmark)."""

from __future__ import annotations

import time


def best_of(functions, repeats: int):
    """Best wall time of each function, calls interleaved so all see the same load."""
    best = [float("inf")] * len(functions)
    for _ in range(repeats):
        for i, fn in enumerate(functions):
            start = time.perf_counter()
            fn()
            best[i] = min(best[i], time.perf_counter() - start)
    return best
