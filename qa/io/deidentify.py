"""What of a DICOM header may travel into :attr:`Volume.meta`: an explicit allow-list.

Only the attributes listed in :data:`KEPT` are copied, so a patient identifier
(Patient's Name, Patient ID, Birth Date, Other Patient IDs, Address, Accession Number,
Referring Physician, free-text comments, ...) can never reach the metadata, the JSON
results or the PDF log, whatever a scanner puts in its headers: nothing is removed
because nothing outside the list is ever read. The list keeps the unit's identity,
the acquisition facts and the object's own identity (series UID, SOP class); free-text
fields that may hold names (descriptions, comments, protocol names) are left out.

The same table tells the writer (:mod:`qa.io.dicom_write`) which attribute a meta key
goes back into.

References
----------
DICOM PS3.15, Annex E, "Attribute Confidentiality Profiles" (Table E.1-1 lists the
attributes that identify a patient; none of them is in :data:`KEPT`).
"""

from __future__ import annotations

import math
import re
from typing import Any

from pydicom.dataset import Dataset
from pydicom.multival import MultiValue
from pydicom.uid import UID

#: (DICOM keyword, meta key). Units are in the key where the attribute has one. The unit
#: facts use the names the rest of Lacuna reads (``serial``, ``station``, ``software``,
#: ``institution``: see qa.history.records.UNIT_INFO_KEYS and qa.session.PUBLIC_META),
#: the source-to-image distance the simulator's name (``source_to_image_mm``).
KEPT: tuple[tuple[str, str], ...] = (
    # unit identity
    ("Manufacturer", "manufacturer"),
    ("ManufacturerModelName", "model"),
    ("DeviceSerialNumber", "serial"),
    ("StationName", "station"),
    ("SoftwareVersions", "software"),
    ("InstitutionName", "institution"),
    ("InstitutionalDepartmentName", "department"),
    ("DetectorID", "detector_serial"),
    ("DetectorType", "detector_type"),
    ("DateOfLastCalibration", "date_of_last_calibration"),
    ("TimeOfLastCalibration", "time_of_last_calibration"),
    # the object itself
    ("Modality", "modality"),
    ("SOPClassUID", "sop_class_uid"),
    ("SeriesInstanceUID", "series_uid"),
    ("SeriesNumber", "series_number"),
    ("ImageType", "image_type"),
    ("VolumeBasedCalculationTechnique", "volume_calculation_technique"),
    ("ReconstructionAlgorithm", "reconstruction_algorithm"),
    ("ConvolutionKernel", "convolution_kernel"),
    # dates and times
    ("AcquisitionDateTime", "acquisition_datetime"),
    ("FrameAcquisitionDateTime", "acquisition_datetime"),
    ("AcquisitionDate", "acquisition_date"),
    ("AcquisitionTime", "acquisition_time"),
    ("SeriesDate", "series_date"),
    ("SeriesTime", "series_time"),
    ("ContentDate", "content_date"),
    ("ContentTime", "content_time"),
    # acquisition geometry and technique
    ("DistanceSourceToDetector", "source_to_image_mm"),
    ("DistanceSourceToPatient", "distance_source_to_patient_mm"),
    ("EstimatedRadiographicMagnificationFactor", "magnification_factor"),
    ("TomoAngle", "tomo_angle_deg"),
    ("TomoType", "tomo_type"),
    ("TomoTime", "tomo_time_s"),
    ("NumberOfTomosynthesisSourceImages", "number_of_source_images"),
    ("PrimaryPositionerScanArc", "scan_arc_deg"),
    ("PrimaryPositionerScanStartAngle", "scan_start_angle_deg"),
    ("PrimaryPositionerIncrement", "scan_angle_increment_deg"),
    ("SecondaryPositionerScanArc", "secondary_scan_arc_deg"),
    ("SecondaryPositionerScanStartAngle", "secondary_scan_start_angle_deg"),
    ("SecondaryPositionerIncrement", "secondary_scan_angle_increment_deg"),
    ("PositionerType", "positioner_type"),
    ("BodyPartThickness", "body_part_thickness_mm"),
    ("CompressionForce", "compression_force_n"),
    ("KVP", "kvp_kv"),
    ("XRayTubeCurrent", "tube_current_ma"),
    ("XRayTubeCurrentInmA", "tube_current_ma"),
    ("ExposureTime", "exposure_time_ms"),
    ("ExposureTimeInms", "exposure_time_ms"),
    ("Exposure", "exposure_mas"),
    ("ExposureInmAs", "exposure_mas"),
    ("AnodeTargetMaterial", "anode_target_material"),
    ("FilterMaterial", "filter_material"),
    ("FocalSpots", "focal_spots_mm"),
    ("OrganDose", "organ_dose_dgy"),
    ("EntranceDoseInmGy", "entrance_dose_mgy"),
    ("ImageLaterality", "laterality"),
    ("Laterality", "laterality"),
    ("FrameLaterality", "laterality"),
)

#: Sequences whose first item is searched too (BTO objects keep the technique there;
#: the shared Frame Anatomy and the first frame's Frame Content are searched as well).
SEARCHED_SEQUENCES = ("XRay3DAcquisitionSequence", "XRay3DReconstructionSequence",
                      "ContributingSourcesSequence")


def plain(value: Any) -> Any:
    """A DICOM value as str/int/float/list, or ``None`` when empty or not plain."""
    if isinstance(value, (MultiValue, list, tuple)):
        items = [plain(v) for v in value]
        items = [v for v in items if v is not None]
        return items or None
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, (str, UID)):
        text = str(value).strip()
        return text or None
    return None  # bytes, person names, sequences: never carried


def _first_items(ds: Dataset) -> list[Dataset]:
    out = [ds]
    for keyword in SEARCHED_SEQUENCES:
        seq = ds.get(keyword)
        if seq:
            out.append(seq[0])
    for groups, group in (("SharedFunctionalGroupsSequence", "FrameAnatomySequence"),
                          ("PerFrameFunctionalGroupsSequence", "FrameContentSequence")):
        seq = ds.get(groups)
        if seq and seq[0].get(group):
            out.append(seq[0].get(group)[0])
    return out


def kept_meta(ds: Dataset) -> dict:
    """The allow-listed facts of a header, as a JSON-serialisable dict.

    The top-level dataset wins over the first items of :data:`SEARCHED_SEQUENCES` and
    of the shared Frame Anatomy; for meta keys fed by two attributes (``ExposureTime``
    and ``ExposureTimeInms``) the first one listed and present wins. Two facts are
    derived: ``acquired`` (ISO date of the acquisition date-time or date) and
    ``half_arc_deg`` (half the Primary Positioner Scan Arc, taking the sweep as
    symmetric about the detector normal; common practice for DBT, not stated by the
    file).
    """
    meta: dict = {}
    for item in _first_items(ds):
        for keyword, key in KEPT:
            if key in meta or keyword not in item:
                continue
            value = plain(item[keyword].value)
            if value is not None:
                meta[key] = value
    if isinstance(meta.get("sop_class_uid"), str):
        meta["sop_class"] = UID(meta["sop_class_uid"]).name
    day = str(meta.get("acquisition_datetime") or meta.get("acquisition_date") or "")[:8]
    if re.fullmatch(r"\d{8}", day):
        meta["acquired"] = f"{day[:4]}-{day[4:6]}-{day[6:]}"  # ISO date, as sessions use
    if isinstance(meta.get("scan_arc_deg"), float) and "half_arc_deg" not in meta:
        meta["half_arc_deg"] = meta["scan_arc_deg"] / 2
    return meta


#: Header attributes whose values must not appear in a path that leaves the reader: the
#: patient's names, IDs, birth date and accession number, and the names of the study's
#: physicians (all listed in PS3.15 Table E.1-1). Exports are often filed in folders
#: named after any of them (the patient, the requesting or referring physician).
_IDENTIFYING = ("PatientName", "PatientID", "OtherPatientIDs", "PatientBirthDate",
                "AccessionNumber", "OtherPatientNames", "PatientBirthName",
                "PatientMotherBirthName", "ReferringPhysicianName",
                "PerformingPhysicianName", "NameOfPhysiciansReadingStudy",
                "RequestingPhysician")
#: Date-valued identifiers among them: also cut out when a path spells the date another
#: way (see :func:`date_spellings`).
_DATES = ("PatientBirthDate",)
_DATE_SEPARATOR = r"[-._ ]?"


def date_spellings(value) -> str | None:
    """A regular expression matching a DICOM date ``YYYYMMDD`` as file names spell it.

    Year first, day first or month first, with or without one of ``- . _`` or a space
    between the parts (``19610203``, ``1961-02-03``, ``03.02.1961``, ``02-03-1961``);
    ``None`` when ``value`` is not an eight-digit date.
    """
    m = re.fullmatch(r"(\d{4})(\d{2})(\d{2})", str(value).strip())
    if m is None:
        return None
    y, mo, d = m.groups()
    orders = ((y, mo, d), (d, mo, y), (mo, d, y))
    return "|".join(_DATE_SEPARATOR.join(parts) for parts in orders)


def scrub_path(path, ds: Dataset) -> str:
    """``path`` as text with any patient identifier of ``ds`` replaced by ``[patient]``.

    Scanners and PACS exports often name folders or files after the patient; the source
    path is shown in logs, JSON and the history, so each identifier found in the header
    (name components of three or more characters, IDs, accession number, the names of
    the study's physicians, and the birth date however the path spells it: see
    :func:`date_spellings`) is cut out of it, case-insensitively.
    """
    text = str(path)
    words: set[str] = set()
    patterns: list[str] = []
    for keyword in _IDENTIFYING:
        value = ds.get(keyword)
        if value is None or value == "":
            continue
        values = value if isinstance(value, (list, tuple, MultiValue)) else [value]
        for v in values:
            if keyword in _DATES and (spelled := date_spellings(v)) is not None:
                patterns.append(spelled)
                continue
            for part in re.split(r"[\^=\s,]+", str(v)):
                if len(part) >= 3:
                    words.add(part)
    patterns += [re.escape(w) for w in sorted(words, key=len, reverse=True)]
    for pattern in patterns:
        text = re.sub(pattern, "[patient]", text, flags=re.IGNORECASE)
    return text
