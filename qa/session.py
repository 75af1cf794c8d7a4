"""One QA session through the back half of the chain: locate, measure, judge.

:func:`measure_volume` runs every registered metric family on a volume;
:func:`judge_session` judges the figures against a profile and the unit's baseline and
returns a :class:`SessionResult`, the record every output (PDF log, JSON, history) is
written from.
"""

from __future__ import annotations

import datetime as _dt
import re
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

from . import __version__
from .errors import InputError, NotMeasurable
from .judge import Judged, Profile, judge_all, overall
from .locate.layout import Layout
from .locate import locate
from .measure.base import FamilyResult, Measurement, families
from .phantom.model import Phantom
from .volume import Volume

#: Volume metadata that may appear in logs, JSON and the history (an allow-list).
PUBLIC_META = ("manufacturer", "model", "serial", "station", "software", "institution",
               "site", "detector", "acquired", "acquisition_time", "series_description",
               "reconstruction", "geometry", "views", "half_arc_deg", "source_to_image_mm",
               "motion", "source_file", "checksum", "sop_class", "transfer_syntax",
               "simulated", "phantom", "seed", "travel_axis")


@dataclass(frozen=True)
class SessionResult:
    """Everything measured and judged in one session."""

    unit_id: str
    date: str                        # YYYY-MM-DD of the acquisition
    analysed: str                    # ISO date-time of the analysis
    phantom: Phantom
    profile: Profile
    families: tuple[FamilyResult, ...]
    judged: tuple[Judged, ...]
    overall: str
    layout: Layout
    meta: Mapping = field(default_factory=dict)
    tool_version: str = __version__
    kind: str = "routine"

    def __post_init__(self):
        object.__setattr__(self, "meta", MappingProxyType(dict(self.meta)))

    @property
    def exit_code(self) -> int:
        return 1 if self.overall == "fail" else 0

    def judged_by_name(self) -> dict[str, Judged]:
        return {j.name: j for j in self.judged}


def safe_unit_id(unit_id: str) -> str:
    """The unit id as used in file names: letters, digits, '.', '-' and '_' only."""
    cleaned = re.sub(r"[^A-Za-z0-9._-]+", "-", unit_id.strip()).strip("-.")
    if not cleaned:
        raise InputError(f"unit id {unit_id!r} has no letters or digits", field="--unit")
    return cleaned


def public_meta(meta: Mapping) -> dict:
    return {k: meta[k] for k in PUBLIC_META if k in meta and meta[k] not in (None, "")}


def _family_missing(family, why: str) -> FamilyResult:
    return FamilyResult(family.name, tuple(
        Measurement.missing(spec.name, spec.unit, why)
        for spec in family.metrics if "*" not in spec.name))


def measure_volume(volume: Volume, phantom: Phantom, *, layout: Layout | None = None):
    """Locate the phantom's objects and run every metric family.

    Returns
    -------
    (Layout, tuple of FamilyResult)
    """
    layout = layout or locate(volume, phantom)
    results = []
    for family in families():
        try:
            results.append(family.measure(volume, layout, None))
        except NotMeasurable as exc:
            results.append(_family_missing(family, f"not measured: {exc}"))
    return layout, tuple(results)


def volume_geometry(meta: Mapping) -> str | None:
    """The name of the geometry profile a volume was acquired with, or ``None``.

    Simulated volumes carry it as ``meta["geometry"]``; a scanner's DICOM does not
    state it.
    """
    value = meta.get("geometry")
    return str(value) if value not in (None, "") else None


def session_date(meta: Mapping, override: str | None = None) -> str:
    """The session's date: ``override``, else the acquisition date in the header, else today."""
    for value in (override, meta.get("acquired")):
        if value:
            text = str(value)
            try:
                return _dt.date.fromisoformat(text[:10]).isoformat()
            except ValueError:
                raise InputError(f"date {text!r} is not YYYY-MM-DD", field="date") from None
    return _dt.date.today().isoformat()


def judge_session(volume: Volume, phantom: Phantom, profile: Profile, *, unit_id: str,
                  baselines: Mapping[str, float] | None = None, date: str | None = None,
                  kind: str = "routine", measured=None) -> SessionResult:
    """Measure (unless ``measured`` = (layout, results) is given) and judge one volume.

    The profile's scope is checked first: a phantom, or a geometry named in the volume's
    metadata (simulated volumes carry ``geometry``), outside the profile's
    ``applies_to`` is refused with an :class:`~qa.errors.InputError` before anything is
    measured. A volume that does not name its geometry is judged without that check.
    """
    profile.check_applies(phantom=phantom.name, geometry=volume_geometry(volume.meta))
    layout, results = measured or measure_volume(volume, phantom)
    figures = [m for r in results for m in r.measurements]
    judged = judge_all(figures, profile, baselines)
    return SessionResult(
        unit_id=safe_unit_id(unit_id), date=session_date(volume.meta, date),
        analysed=_dt.datetime.now().replace(microsecond=0).isoformat(),
        phantom=phantom, profile=profile, families=results, judged=judged,
        overall=overall(judged), layout=layout, meta=public_meta(volume.meta), kind=kind)
