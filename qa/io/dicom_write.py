"""Write a Volume as a DICOM Breast Tomosynthesis Image (enhanced multi-frame) object.

The object is meant for QA work (simulated or re-exported phantom volumes), so its
Patient module holds placeholder phantom values (``QA^PHANTOM`` / ``LACUNA-QA``) and
nothing from a real patient. It is written in Explicit VR Little Endian, uncompressed,
and checked by the tests with ``dciodvfy`` (dicom3tools) and ``dcmdump`` (dcmtk).

Geometry follows :mod:`qa.io.dicom_geometry` in reverse: plane ``k`` is frame ``k``,
at ``origin_z + k dz`` along the normal of the orientation kept in
``meta["image_orientation_patient"]`` (default: rows along patient x, columns along
patient y, so the normal is patient z).

References
----------
DICOM PS3.3 A.55 (Breast Tomosynthesis Image IOD), C.7.6.16 (Multi-frame Functional
Groups), C.7.6.17 (Multi-frame Dimension), C.8.21 (X-Ray 3D Image).
"""

from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path
from typing import Mapping

import numpy as np
from pydicom.datadict import dictionary_VR
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence
from pydicom.uid import (BreastTomosynthesisImageStorage, ExplicitVRLittleEndian,
                         PYDICOM_IMPLEMENTATION_UID, generate_uid)
from pydicom.valuerep import format_number_as_ds

from .. import __version__
from ..errors import InputError
from ..fileio import atomic_path
from ..volume import Volume
from .deidentify import KEPT
from .dicom_geometry import patient_frame

META_KEY = dict(KEPT)

#: Unit identity written into General / Enhanced General Equipment (from ``unit`` or
#: the volume's meta, under the meta keys of :data:`qa.io.deidentify.KEPT`).
UNIT_ATTRIBUTES = {META_KEY[kw]: kw for kw in (
    "Manufacturer", "ManufacturerModelName", "DeviceSerialNumber", "StationName",
    "SoftwareVersions", "InstitutionName", "InstitutionalDepartmentName",
    "DateOfLastCalibration", "TimeOfLastCalibration")}
#: Acquisition facts of the meta written back (see :func:`_acquisition_facts`).
ACQUISITION_ATTRIBUTES = {META_KEY[kw]: kw for kw in (
    "DistanceSourceToDetector", "DistanceSourceToPatient", "BodyPartThickness",
    "CompressionForce", "KVP", "PrimaryPositionerScanArc",
    "PrimaryPositionerScanStartAngle", "PrimaryPositionerIncrement")}
_DEFAULT_UNIT = {"manufacturer": "Lacuna", "model": "Lacuna digital phantom",
                 "serial": "LACUNA-QA", "software": f"lacuna {__version__}"}
PATIENT_NAME = "QA^PHANTOM"
PATIENT_ID = "LACUNA-QA"
UINT16_MAX = 65535
#: View Code Sequence values (DICOM CID 4014 "View for Mammography", SNOMED CT codes;
#: from memory, accepted by dciodvfy).
VIEWS = {"CC": ("399162004", "SCT", "cranio-caudal"),
         "MLO": ("399368009", "SCT", "medio-lateral oblique")}
#: Anatomic Region Sequence value (DICOM CID 4031, SNOMED CT; from memory).
BREAST = ("76752008", "SCT", "Breast")
#: UCUM codes understood for ``value_unit`` and their Code Meaning (DICOM PS3.16 uses
#: ("1", "UCUM", "no units") for unitless values; from memory). Other codes are written
#: with the code itself as meaning.
VALUE_UNITS = {"1": "no units", "/mm": "per millimeter", "/cm": "per centimeter",
               "[hnsf'U]": "Hounsfield unit"}
#: LUT Label of the Real World Value Mapping this writer puts in.
LUT_LABEL = "LACUNA_VALUES"


def quantise(data: np.ndarray, *, source: str | None = None
             ) -> tuple[np.ndarray, float, float]:
    """Map float voxels to uint16 with a linear mapping chosen from the data range.

    Returns
    -------
    stored : (nz, ny, nx) uint16 ndarray
    slope, intercept : float
        ``value = slope * stored + intercept``; ``slope`` is the quantum, in the
        volume's value unit per stored step.

    Notes
    -----
    With ``b = min(v)`` and ``m = (max(v) - b) / 65535``, ``q = round((v - b) / m)``
    covers the range in ``0 ... 65535`` and ``|v - (m q + b)| <= m / 2`` for every
    voxel: the quantisation error is at most half a quantum (plus float64 rounding,
    some 1e-16 of the range). A constant volume gets ``m = 1`` and is stored exactly.
    """
    if isinstance(data, np.ndarray):
        lo, hi = float(np.min(data)), float(np.max(data))
    else:  # a LazyStack: its range plane by plane, never the whole volume at once
        ranges = [(float(np.min(p)), float(np.max(p))) for p in data]
        lo, hi = min(r[0] for r in ranges), max(r[1] for r in ranges)
    if not (np.isfinite(lo) and np.isfinite(hi)):
        raise InputError("the volume holds NaN or infinite values; DICOM cannot store them",
                         source=source, field="data")
    slope = (hi - lo) / UINT16_MAX if hi > lo else 1.0
    stored = np.empty(data.shape, dtype=np.uint16)
    for k in range(data.shape[0]):  # plane by plane: no float64 copy of the volume
        q = np.rint((data[k].astype(np.float64) - lo) / slope)
        stored[k] = np.clip(q, 0, UINT16_MAX)
    return stored, slope, lo


def _item(**attrs) -> Dataset:
    ds = Dataset()
    for keyword, value in attrs.items():
        setattr(ds, keyword, value)
    return ds


def _code(value: str, scheme: str, meaning: str) -> Dataset:
    return _item(CodeValue=value, CodingSchemeDesignator=scheme, CodeMeaning=meaning)


def _unit_values(volume: Volume, unit: Mapping | None, path: Path) -> dict:
    unit = dict(unit or {})
    unknown = sorted(set(unit) - set(UNIT_ATTRIBUTES))
    if unknown:
        raise InputError(f"unknown unit fields {unknown}; expected some of "
                         f"{sorted(UNIT_ATTRIBUTES)}", source=str(path), field="unit")
    values = {k: volume.meta[k] for k in UNIT_ATTRIBUTES if volume.meta.get(k)}
    if "institution" not in values and volume.meta.get("site"):
        values["institution"] = volume.meta["site"]  # the simulator's name for it
    values.update({k: v for k, v in unit.items() if v not in (None, "")})
    out = {k: [str(x) for x in v] if isinstance(v, (list, tuple)) else str(v)
           for k, v in {**_DEFAULT_UNIT, **values}.items()}
    for key, value in out.items():
        _check_length(UNIT_ATTRIBUTES[key], value, path, key)
    return out


#: Longest value of the text VRs written from user data (DICOM PS3.5 Table 6.2-1).
_MAX_CHARS = {"LO": 64, "SH": 16, "CS": 16, "DA": 8, "TM": 16}


def _check_length(keyword: str, value, path: Path, field: str) -> None:
    limit = _MAX_CHARS.get(dictionary_VR(keyword))
    for text in value if isinstance(value, list) else [value]:
        if limit is not None and len(text) > limit:
            raise InputError(f"{text!r} is {len(text)} characters; DICOM {keyword} "
                             f"({dictionary_VR(keyword)}) holds at most {limit}",
                             source=str(path), field=field)


def build_dataset(volume: Volume, *, path: Path, unit, laterality, view, value_unit,
                  series_description, series_number, study_uid, series_uid,
                  frame_of_reference_uid, when) -> Dataset:
    """The Breast Tomosynthesis dataset of ``volume``; options as in :func:`write_dicom`."""
    if laterality not in ("R", "L"):
        raise InputError(f"laterality must be 'R' or 'L', got {laterality!r}",
                         source=str(path), field="laterality")
    if view not in VIEWS:
        raise InputError(f"view must be one of {sorted(VIEWS)}, got {view!r}",
                         source=str(path), field="view")
    _check_length("SeriesDescription", series_description, path, "series_description")
    nz, ny, nx = volume.shape
    dz, dy, dx = volume.spacing_mm
    orientation, positions = patient_frame(volume.origin_mm, volume.spacing_mm, nz,
                                           volume.meta.get("image_orientation_patient"))
    stored, slope, intercept = quantise(volume.data, source=str(path))
    when = when or _dt.datetime.now()
    date, time = when.strftime("%Y%m%d"), when.strftime("%H%M%S")
    sop_uid = generate_uid()

    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.MediaStorageSOPClassUID = BreastTomosynthesisImageStorage
    ds.file_meta.MediaStorageSOPInstanceUID = sop_uid
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta.ImplementationClassUID = PYDICOM_IMPLEMENTATION_UID
    ds.file_meta.ImplementationVersionName = f"LACUNA_{__version__}"[:16]
    ds.SpecificCharacterSet = "ISO_IR 100"

    # SOP Common, Patient, General Study (placeholder phantom values, never a patient)
    ds.SOPClassUID = BreastTomosynthesisImageStorage
    ds.SOPInstanceUID = sop_uid
    ds.InstanceCreationDate, ds.InstanceCreationTime = date, time
    ds.PatientName, ds.PatientID = PATIENT_NAME, PATIENT_ID
    ds.PatientBirthDate, ds.PatientSex = "", "O"
    ds.StudyInstanceUID = study_uid or generate_uid()
    ds.StudyDate, ds.StudyTime = date, time
    ds.ReferringPhysicianName, ds.StudyID, ds.AccessionNumber = "", PATIENT_ID, ""
    # General Series, Enhanced Mammography Series, Frame of Reference
    ds.Modality = "MG"
    ds.SeriesInstanceUID = series_uid or generate_uid()
    ds.SeriesNumber = int(series_number)
    ds.SeriesDate, ds.SeriesTime = date, time
    ds.SeriesDescription = series_description
    ds.FrameOfReferenceUID = frame_of_reference_uid or generate_uid()
    ds.PositionReferenceIndicator = ""
    # General and Enhanced General Equipment
    for key, value in _unit_values(volume, unit, path).items():
        setattr(ds, UNIT_ATTRIBUTES[key], value)
    # Image Pixel
    ds.SamplesPerPixel, ds.PhotometricInterpretation = 1, "MONOCHROME2"
    ds.Rows, ds.Columns = ny, nx
    ds.BitsAllocated, ds.BitsStored, ds.HighBit, ds.PixelRepresentation = 16, 16, 15, 0
    # X-Ray 3D Image, Acquisition Context, Breast View
    ds.ImageType = ["DERIVED", "PRIMARY", "TOMOSYNTHESIS", "NONE"]
    ds.PixelPresentation = "MONOCHROME"
    ds.VolumetricProperties = "VOLUME"
    ds.VolumeBasedCalculationTechnique = "TOMOSYNTHESIS"
    ds.ContentQualification = "RESEARCH"
    ds.BurnedInAnnotation = "NO"
    ds.RecognizableVisualFeatures = "NO"
    ds.LossyImageCompression = "00"
    ds.PresentationLUTShape = "IDENTITY"
    ds.ContentDate, ds.ContentTime = date, time
    ds.AcquisitionContextSequence = Sequence()
    view_item = _code(*VIEWS[view])
    view_item.ViewModifierCodeSequence = Sequence()  # Type 2: no modifier
    ds.ViewCodeSequence = Sequence([view_item])
    ds.BreastImplantPresent = "NO"
    _acquisition_facts(ds, volume.meta)
    # Multi-frame Functional Groups
    ds.InstanceNumber = 1
    ds.NumberOfFrames = nz
    thickness = volume.meta.get("slice_thickness_mm")
    if not (isinstance(thickness, (int, float)) and thickness > 0):
        thickness = dz  # no better knowledge: the plane spacing
    ds.SharedFunctionalGroupsSequence = Sequence([_shared_groups(
        orientation, (dy, dx), dz, float(thickness), stored, slope, intercept, laterality,
        value_unit)])
    stamp = _acquisition_stamp(volume.meta) or when.strftime("%Y%m%d%H%M%S")
    ds.PerFrameFunctionalGroupsSequence = Sequence(
        _frame_groups(k, positions[k], stamp) for k in range(nz))
    # Multi-frame Dimension: stack id and in-stack position (PS3.3 C.7.6.17)
    dim_uid = generate_uid()
    ds.DimensionOrganizationSequence = Sequence([_item(DimensionOrganizationUID=dim_uid)])
    ds.DimensionIndexSequence = Sequence([
        _item(DimensionOrganizationUID=dim_uid, DimensionIndexPointer=0x00209056,
              FunctionalGroupPointer=0x00209111, DimensionDescriptionLabel="Stack ID"),
        _item(DimensionOrganizationUID=dim_uid, DimensionIndexPointer=0x00209057,
              FunctionalGroupPointer=0x00209111,
              DimensionDescriptionLabel="In-Stack Position Number")])
    ds.PixelData = stored.tobytes()
    return ds


def _shared_groups(orientation, pixel_spacing, dz, thickness, stored, slope, intercept,
                   laterality, value_unit) -> Dataset:
    """Functional groups common to all frames (PS3.3 A.55.4).

    The Pixel Value Transformation of a Breast Tomosynthesis Image is the identity
    (enumerated values slope 1, intercept 0), so the stored-to-value mapping travels in
    the Real World Value Mapping (PS3.3 C.7.6.16.2.11), in FD precision. The VOI window
    applies to stored values (after the identity rescale).
    """
    lo, hi = float(stored.min()), float(stored.max())
    return _item(
        PixelMeasuresSequence=Sequence([_item(
            PixelSpacing=[format_number_as_ds(float(v)) for v in pixel_spacing],
            SliceThickness=format_number_as_ds(thickness),
            SpacingBetweenSlices=format_number_as_ds(float(dz)))]),
        PlaneOrientationSequence=Sequence([_item(
            ImageOrientationPatient=[format_number_as_ds(v) for v in orientation])]),
        PixelValueTransformationSequence=Sequence([_item(
            RescaleIntercept="0", RescaleSlope="1", RescaleType="US")]),
        RealWorldValueMappingSequence=Sequence([_item(
            RealWorldValueFirstValueMapped=0, RealWorldValueLastValueMapped=UINT16_MAX,
            RealWorldValueIntercept=float(intercept), RealWorldValueSlope=float(slope),
            LUTExplanation="Lacuna volume values", LUTLabel=LUT_LABEL,
            MeasurementUnitsCodeSequence=Sequence([_code(
                value_unit, "UCUM", VALUE_UNITS.get(value_unit, value_unit))]))]),
        FrameVOILUTSequence=Sequence([_item(
            WindowCenter=format_number_as_ds((lo + hi) / 2),
            WindowWidth=format_number_as_ds(max(hi - lo, 1.0)))]),
        FrameAnatomySequence=Sequence([_item(
            FrameLaterality=laterality, AnatomicRegionSequence=Sequence([_code(*BREAST)]))]),
    )


def _acquisition_stamp(meta) -> str | None:
    """DICOM DT of the acquisition from the meta (DT text, or an ISO date), if any."""
    stamp = str(meta.get("acquisition_datetime", ""))
    if re.fullmatch(r"\d{8,14}(\.\d{1,6})?", stamp):
        return stamp
    iso = str(meta.get("acquired", ""))[:10]
    if re.fullmatch(r"\d{4}-\d{2}-\d{2}", iso):
        return iso.replace("-", "")
    return None


def _frame_groups(k: int, position, stamp: str) -> Dataset:
    return _item(
        PlanePositionSequence=Sequence([_item(
            ImagePositionPatient=[format_number_as_ds(float(v)) for v in position])]),
        FrameContentSequence=Sequence([_item(
            FrameAcquisitionDateTime=stamp, FrameReferenceDateTime=stamp,
            FrameAcquisitionDuration=0.0, StackID="1", InStackPositionNumber=k + 1,
            DimensionIndexValues=[1, k + 1])]),
        XRay3DFrameTypeSequence=Sequence([_item(
            FrameType=["DERIVED", "PRIMARY", "TOMOSYNTHESIS", "NONE"],
            PixelPresentation="MONOCHROME", VolumetricProperties="VOLUME",
            VolumeBasedCalculationTechnique="TOMOSYNTHESIS")]),
    )


def _acquisition_facts(ds: Dataset, meta) -> None:
    """Acquisition facts of the meta, as top-level standard attributes.

    The IOD's own place for them, the Breast Tomosynthesis Acquisition Module, needs
    some twenty Type 1 values per acquisition and per projection that a volume does not
    carry; rather than invent them, the known facts are written as standard attributes
    outside the IOD (a Standard Extended SOP Class, PS3.4 B.1.3), which dciodvfy reports
    as a warning, not an error.
    """
    meta = dict(meta)
    if "scan_arc_deg" not in meta and isinstance(meta.get("half_arc_deg"), (int, float)):
        meta["scan_arc_deg"] = 2 * meta["half_arc_deg"]
    for key, keyword in ACQUISITION_ATTRIBUTES.items():
        value = meta.get(key)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            vr = dictionary_VR(keyword)
            setattr(ds, keyword, format_number_as_ds(float(value)) if vr == "DS"
                    else float(value))


def write_dicom(volume: Volume, path, *, unit: Mapping | None = None, laterality: str = "R",
                view: str = "CC", value_unit: str = "1",
                series_description: str = "Lacuna QA volume", series_number: int = 1,
                study_uid: str | None = None, series_uid: str | None = None,
                frame_of_reference_uid: str | None = None,
                when: _dt.datetime | None = None) -> Path:
    """Write ``volume`` as a Breast Tomosynthesis Image Storage object, atomically.

    Parameters
    ----------
    volume : Volume
        The volume; plane ``k`` becomes frame ``k``.
    path : str or Path
        Target file (written to a temporary file in the same folder, then renamed).
    unit : mapping, optional
        Identity of the scanner, by meta key (``manufacturer``, ``model``, ``serial``,
        ``station``, ``software``, ``institution``, ``department``, ...; see
        :data:`UNIT_ATTRIBUTES`). Overrides the same keys of ``volume.meta`` (where
        ``site`` stands in for ``institution``); what neither gives gets Lacuna's
        placeholder values (Manufacturer, model, serial and software are Type 1).
    laterality : {"R", "L"}
        Frame Laterality of the Breast View; a phantom is filed as a right breast
        unless told otherwise.
    view : {"CC", "MLO"}
        View Code Sequence of the Breast View.
    value_unit : str
        UCUM code of the voxel values (``"1"``: no unit, ``"/mm"``: linear attenuation),
        written in the Real World Value Mapping.
    series_description, series_number : str, int
        General Series values.
    study_uid, series_uid, frame_of_reference_uid : str, optional
        UIDs to reuse (to group several objects); new ones from
        :func:`pydicom.uid.generate_uid` otherwise.
    when : datetime, optional
        Study/series/content date and time; now by default. The frames' acquisition
        date-time is ``meta["acquisition_datetime"]`` (DICOM DT) or ``meta["acquired"]``
        (ISO date) when the volume carries one.

    Returns
    -------
    Path

    Notes
    -----
    Voxels are stored as uint16 through a slope ``m`` and intercept ``b`` chosen from
    the data range (:func:`quantise`); the error is at most ``m / 2``,
    ``m = (max - min) / 65535``. The IOD fixes Rescale Slope/Intercept to 1/0, so ``m``
    and ``b`` are written (as FD) in the Real World Value Mapping functional group,
    which :func:`qa.io.read_volume` applies.
    """
    path = Path(path)
    ds = build_dataset(volume, path=path, unit=unit, laterality=laterality, view=view,
                       value_unit=value_unit,
                       series_description=series_description, series_number=series_number,
                       study_uid=study_uid, series_uid=series_uid,
                       frame_of_reference_uid=frame_of_reference_uid, when=when)
    with atomic_path(path) as tmp:
        ds.save_as(tmp, enforce_file_format=True)
    return path
