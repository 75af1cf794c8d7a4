"""How many threads the numerical stages use (numpy releases the GIL in its kernels)."""

import os


def workers() -> int:
    """Worker threads: ``LACUNA_THREADS`` if set, else the usable cores, at most 4."""
    env = os.environ.get("LACUNA_THREADS", "").strip()
    if env.isdigit() and int(env) > 0:
        return int(env)
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(4, cores))
