"""Lacuna: quality assurance for limited-angle X-ray scanners.

The package follows the chain of ``DEVELOPERS.md``: phantom definition, simulated or
real volume, location of the test objects, measurement, judgement, history, log.
"""

from importlib import metadata as _metadata
from pathlib import Path as _Path

try:
    __version__ = _metadata.version("lacuna")
except _metadata.PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+source"

#: The project folder holding ``phantoms/`` and ``thresholds/`` (an editable install).
PROJECT_ROOT = _Path(__file__).resolve().parent.parent

__all__ = ["__version__", "PROJECT_ROOT"]
