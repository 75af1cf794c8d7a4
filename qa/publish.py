"""Writing a judged session out: PDF log, JSON results and the history, all or nothing.

The log and the JSON are rendered in memory and written atomically (the log under the
first free name of :func:`~qa.report.pdf.log_name`, never over an earlier log); the
session is then recorded in the history in one transaction. If recording fails, the two
files just written are removed again, so a failed run leaves neither a log without a
history entry nor a history entry without its log.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from .fileio import write_bytes_atomic
from .history import History
from .history.records import MeasurementRecord, SessionRecord, acquisition_from, unit_info_from
from .report.jsonout import session_json
from .report.pdf import render_pdf, write_pdf
from .session import SessionResult


@dataclass(frozen=True)
class Published:
    report: Path
    json: Path | None
    session_id: int | None


def session_record(result: SessionResult, report_path: str) -> SessionRecord:
    """The history's record of a judged session."""
    ms = tuple(MeasurementRecord(j.name, j.measurement.value, j.measurement.unit,
                                 j.measurement.uncertainty, j.verdict, j.measurement.note,
                                 j.limit_text) for j in result.judged)
    return SessionRecord(
        unit_id=result.unit_id, acquired=result.meta.get("acquired", result.date),
        analysed=result.analysed, phantom=result.phantom.name, profile=result.profile.name,
        tool_version=result.tool_version, overall=result.overall, measurements=ms,
        unit_info=unit_info_from(result.meta), source=str(result.meta.get("source_file", "")),
        checksum=str(result.meta.get("checksum", "")), report_path=report_path,
        kind=result.kind, acquisition=acquisition_from(result.meta))


def baselines_for(history_path, unit_id: str, phantom: str) -> dict[str, float]:
    """The unit's baseline values in force now (empty when none, or no database yet)."""
    if history_path is None or not Path(history_path).exists():
        return {}
    with History.open(history_path) as h:
        return {k: v.value for k, v in h.baseline(unit_id, phantom).items()}


def history_pages(history_path, result: SessionResult, profile) -> list:
    """Trend pages for the log when the unit already has sessions in the history."""
    if history_path is None or not Path(history_path).exists():
        return []
    with History.open(history_path) as h:
        if not h.sessions(unit_id=result.unit_id, phantom=result.phantom.name):
            return []
    from .report.trends import trend_pages
    return trend_pages(history_path, result.unit_id, result.phantom.name, profile,
                       current=result, charts="headline")


def publish(result: SessionResult, volume, *, out_dir, json_path=None, history_path=None,
            extra_pages=(), json_beside: bool = False) -> Published:
    """Write the log (and JSON) and record the session; see the module's notes.

    With ``json_beside`` (and no ``json_path``) the JSON takes the log's own name with
    ``.json``, so a later log of the same day (``_2``...) gets its own JSON too.
    """
    pdf = render_pdf(result, volume, extra_pages=extra_pages)
    report = write_pdf(result, out_dir, pdf=pdf)
    if json_path is None and json_beside:
        json_path = report.with_suffix(".json")
    written = [report]
    try:
        text = json.dumps(session_json(result, str(report)), indent=2,
                          ensure_ascii=False) + "\n"
        if json_path is not None:
            written.append(write_bytes_atomic(json_path, text.encode("utf-8")))
        session_id = None
        if history_path is not None:
            with History.open(history_path) as h:
                session_id = h.record(session_record(result, str(report)))
    except BaseException:
        for path in written:
            path.unlink(missing_ok=True)
        raise
    return Published(report, None if json_path is None else Path(json_path), session_id)


def assess_file(source, phantom, profile, *, unit: str | None, out_dir, json_path=None,
                history_path=None, date: str | None = None, kind: str = "routine",
                series: str | None = None, travel_axis: str = "rows"):
    """Read one volume file or folder, measure, judge and publish it.

    Returns ``(SessionResult, Published)``. The unit id is ``unit`` or, failing that,
    the serial number or station name in the header; ``series`` picks one series of a
    folder holding several; ``travel_axis`` is where the stored images hold the source
    travel (:func:`qa.io.read_volume`).
    """
    from .fileio import sha256_of
    from .io import read_volume
    from .session import judge_session, safe_unit_id

    source = Path(source)
    volume = read_volume(source, series=series, travel_axis=travel_axis)
    volume = volume.with_meta(source_file=str(volume.meta.get("source_file", source)),
                              checksum=sha256_of(source))
    if unit:
        unit_id = safe_unit_id(unit)
    else:
        found = next((str(volume.meta[k]) for k in ("serial", "station") if volume.meta.get(k)),
                     "unknown-unit")
        unit_id = safe_unit_id(found)
    result = judge_session(volume, phantom, profile, unit_id=unit_id,
                           baselines=baselines_for(history_path, unit_id, phantom.name),
                           date=date, kind=kind)
    published = publish(result, volume, out_dir=out_dir, json_path=json_path,
                        history_path=history_path,
                        extra_pages=history_pages(history_path, result, profile))
    return result, published
