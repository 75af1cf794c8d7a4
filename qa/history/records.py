"""Plain records the history stage stores and returns.

A :class:`SessionRecord` is what one analysis run hands to :meth:`History.record
<qa.history.db.History.record>`: the unit, the acquisition and analysis dates, the phantom,
the threshold profile, the tool version, the overall verdict and one
:class:`MeasurementRecord` per reported figure. What comes back from the database carries
its row id (:class:`StoredSession`, :class:`StoredBaseline`, :class:`UnitRecord`).

Unit facts are limited to the keys of :data:`UNIT_INFO_KEYS` so that nothing read from
an image header other than the scanner's identity (in particular no patient identifier)
can reach the database; :func:`unit_info_from` picks those keys out of a volume's
metadata.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import date, datetime
from types import MappingProxyType
from typing import Mapping, NamedTuple

from ..errors import InputError

#: The verdicts of the judging stage, in plain words.
VERDICTS = ("pass", "warning", "fail", "not measured")

#: Why a session was run.
KINDS = ("acceptance", "routine", "after-update", "demo")

#: The only unit facts the database accepts: the scanner's identity and place.
UNIT_INFO_KEYS = frozenset({
    "manufacturer", "model", "serial", "station", "software", "site", "institution",
    "department", "room", "modality", "detector", "detector_serial",
})

#: Facts of one acquisition a session may carry into the history (from the image header
#: or the simulator): how the volume was made, never who was imaged.
ACQUISITION_KEYS = frozenset({
    "acquisition_time", "geometry", "reconstruction", "views", "half_arc_deg",
    "source_to_image_mm", "motion", "travel_axis", "simulated",
})


def acquisition_from(meta: Mapping) -> dict[str, str]:
    """Pick the acquisition facts of :data:`ACQUISITION_KEYS` out of a metadata mapping.

    Every other key is dropped; numbers are written as text; empty values are dropped.

    Examples
    --------
    >>> acquisition_from({"views": 15, "half_arc_deg": 12.5, "PatientID": "X1"})
    {'half_arc_deg': '12.5', 'views': '15'}
    """
    return {k: str(v) for k, v in sorted(dict(meta or {}).items())
            if k in ACQUISITION_KEYS and v not in (None, "") and not isinstance(v, (dict, list))}

#: DICOM attribute keywords that name the same unit facts (for :func:`unit_info_from`).
_DICOM_KEYWORDS = {
    "Manufacturer": "manufacturer", "ManufacturerModelName": "model",
    "DeviceSerialNumber": "serial", "StationName": "station",
    "SoftwareVersions": "software", "InstitutionName": "institution",
    "InstitutionalDepartmentName": "department", "Modality": "modality",
    "DetectorID": "detector_serial", "DetectorDescription": "detector",
}


def _iso(value, field_name: str, *, date_allowed: bool) -> str:
    """``value`` (str, date or datetime) as normalised ISO 8601 text."""
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, date):
        if not date_allowed:
            value = datetime(value.year, value.month, value.day)
        return value.isoformat()
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"expected an ISO date or date-time, got {value!r}", field=field_name)
    text = value.strip()
    try:
        if len(text) == 10:  # YYYY-MM-DD
            parsed = date.fromisoformat(text)
            return parsed.isoformat() if date_allowed else datetime(
                parsed.year, parsed.month, parsed.day).isoformat()
        return datetime.fromisoformat(text).isoformat()
    except ValueError:
        raise InputError(f"expected an ISO date or date-time (2024-03-01 or "
                         f"2024-03-01T09:30:00), got {value!r}", field=field_name) from None


def _number(value, field_name: str) -> float | None:
    if value is None:
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise InputError(f"expected a number or nothing, got {value!r}",
                         field=field_name) from None
    return number if math.isfinite(number) else None


@dataclass(frozen=True)
class MeasurementRecord:
    """One reported figure of a session, with its verdict.

    ``value`` and ``uncertainty`` (one standard uncertainty, same unit) are ``None`` when
    not available; a non-finite number is stored as ``None``. A figure without a value
    must have the verdict ``"not measured"``.
    """

    name: str
    value: float | None
    unit: str
    uncertainty: float | None
    verdict: str
    note: str = ""
    limit_text: str = ""

    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name.strip():
            raise InputError(f"a measurement needs a name, got {self.name!r}", field="name")
        where = f"measurement '{self.name}'"
        object.__setattr__(self, "value", _number(self.value, f"{where}.value"))
        object.__setattr__(self, "uncertainty",
                           _number(self.uncertainty, f"{where}.uncertainty"))
        if self.verdict not in VERDICTS:
            raise InputError(f"verdict must be one of {', '.join(VERDICTS)}; "
                             f"got {self.verdict!r}", field=f"{where}.verdict")
        if self.value is None and self.verdict != "not measured":
            raise InputError(f"a figure without a value must have the verdict "
                             f"'not measured', got {self.verdict!r}", field=f"{where}.verdict")
        for attr in ("unit", "note", "limit_text"):
            if not isinstance(getattr(self, attr), str):
                raise InputError("expected text", field=f"{where}.{attr}")

    @property
    def measured(self) -> bool:
        return self.value is not None


@dataclass(frozen=True)
class SessionRecord:
    """One QA session: a unit, a phantom acquisition, its analysis and its results.

    ``acquired`` is an ISO date or date-time (the scanner's local time, as in the image
    header); ``analysed`` an ISO date-time. Both are normalised to ISO 8601 text.
    ``unit_info`` may only use the keys of :data:`UNIT_INFO_KEYS` when recorded, and
    ``acquisition`` (the facts of this acquisition: geometry, views, arc, distance) only
    those of :data:`ACQUISITION_KEYS`.
    """

    unit_id: str
    acquired: str
    analysed: str
    phantom: str
    profile: str
    tool_version: str
    overall: str
    measurements: tuple[MeasurementRecord, ...]
    unit_info: Mapping[str, str] = field(default_factory=dict)
    source: str = ""
    checksum: str = ""
    report_path: str = ""
    kind: str = "routine"
    acquisition: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self):
        for attr in ("unit_id", "phantom", "profile", "tool_version"):
            value = getattr(self, attr)
            if not isinstance(value, str) or not value.strip():
                raise InputError(f"expected non-empty text, got {value!r}", field=attr)
        for attr in ("source", "checksum", "report_path"):
            if not isinstance(getattr(self, attr), str):
                raise InputError("expected text", field=attr)
        object.__setattr__(self, "acquired", _iso(self.acquired, "acquired", date_allowed=True))
        object.__setattr__(self, "analysed", _iso(self.analysed, "analysed", date_allowed=False))
        if self.overall not in VERDICTS:
            raise InputError(f"overall verdict must be one of {', '.join(VERDICTS)}; "
                             f"got {self.overall!r}", field="overall")
        if self.kind not in KINDS:
            raise InputError(f"kind must be one of {', '.join(KINDS)}; got {self.kind!r}",
                             field="kind")
        measurements = tuple(self.measurements)
        seen = set()
        for m in measurements:
            if not isinstance(m, MeasurementRecord):
                raise InputError(f"expected MeasurementRecord items, got {type(m).__name__}",
                                 field="measurements")
            if m.name in seen:
                raise InputError(f"measurement '{m.name}' appears twice", field="measurements")
            seen.add(m.name)
        object.__setattr__(self, "measurements", measurements)
        object.__setattr__(self, "unit_info", _text_facts(self.unit_info, "unit_info", "unit"))
        object.__setattr__(self, "acquisition",
                           _text_facts(self.acquisition, "acquisition", "acquisition"))


def _text_facts(facts, field_name: str, what: str) -> Mapping[str, str]:
    """A read-only copy of ``facts``, refused unless every key and value is text."""
    out = dict(facts or {})
    for key, value in out.items():
        if not isinstance(key, str) or not isinstance(value, str):
            raise InputError(f"{what} facts must be text, got {key!r}: {value!r}",
                             field=field_name)
    return MappingProxyType(out)


@dataclass(frozen=True)
class StoredSession:
    """A session as stored: :class:`SessionRecord`'s facts plus the row id.

    ``recorded`` is the UTC time the row was written; ``n_measurements`` the number of
    its measurement rows (read them with :meth:`History.measurements`).
    """

    id: int
    unit_id: str
    acquired: str
    analysed: str
    phantom: str
    profile: str
    tool_version: str
    overall: str
    kind: str
    unit_info: Mapping[str, str]
    source: str
    checksum: str
    report_path: str
    recorded: str
    n_measurements: int
    acquisition: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class UnitRecord:
    """A unit with its latest known facts and the span of its sessions."""

    unit_id: str
    info: Mapping[str, str]
    first_acquired: str
    last_acquired: str
    n_sessions: int


@dataclass(frozen=True)
class BaselineValue:
    """The baseline of one metric: mean over ``n`` sessions, sample SD (``None`` if n = 1)."""

    value: float
    sd: float | None
    n: int
    unit: str


@dataclass(frozen=True)
class StoredBaseline:
    """One baseline as set: when, by whom, why, from which sessions, and its values.

    ``superseded_at`` / ``superseded_by`` are ``None`` while it is in force.
    """

    id: int
    unit_id: str
    phantom: str
    set_at: str
    set_by: str
    reason: str
    session_ids: tuple[int, ...]
    values: Mapping[str, BaselineValue]
    superseded_at: str | None
    superseded_by: int | None


class SeriesPoint(NamedTuple):
    """One point of a metric's trend: ``(acquired, value, uncertainty, session_id)``."""

    acquired: str
    value: float
    uncertainty: float | None
    session_id: int


def unit_info_from(meta: Mapping) -> dict[str, str]:
    """Pick the unit facts of :data:`UNIT_INFO_KEYS` out of a metadata mapping.

    Keys are matched in lower case, and the DICOM keywords of the same facts
    (``Manufacturer``, ``ManufacturerModelName``, ``DeviceSerialNumber``,
    ``StationName``, ``SoftwareVersions``, ``InstitutionName``, ...) are translated.
    Every other key (patient and study identifiers, geometry, file names) is dropped.
    Numbers are written as text; empty values and nested values are dropped.

    Examples
    --------
    >>> unit_info_from({"Manufacturer": "Acme", "PatientName": "X^Y", "serial": 7})
    {'manufacturer': 'Acme', 'serial': '7'}
    """
    out: dict[str, str] = {}
    for key, value in dict(meta or {}).items():
        if not isinstance(key, str):
            continue
        name = _DICOM_KEYWORDS.get(key, key.lower())
        if name not in UNIT_INFO_KEYS or isinstance(value, (Mapping, bytes)):
            continue
        if isinstance(value, (list, tuple)):
            value = "\\".join(str(v) for v in value)
        text = str(value).strip() if value is not None else ""
        if text:
            out[name] = text
    return out
