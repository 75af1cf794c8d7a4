"""The measuring stage: one module per metric family (see :mod:`qa.measure.base`)."""

from .base import FamilyResult, Measurement, MetricFamily, MetricSpec, Roi, families, find_spec

__all__ = ["FamilyResult", "Measurement", "MetricFamily", "MetricSpec", "Roi",
           "families", "find_spec"]
