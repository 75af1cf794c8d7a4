"""The JSON results of a session, for other tools and spreadsheets.

The contract (``README.md``, "Results as JSON")::

    {"unit": str, "date": "YYYY-MM-DD", "profile": str, "overall": "pass|warning|fail",
     "report": "<path of the PDF>",
     "metrics": {NAME: {"value": float|null, "unit": str, "uncertainty": float|null,
                        "verdict": "pass|warning|fail|not measured", "note": str,
                        "limit": str|null, "judged": bool}}}

``judged`` is false when no level was applied to the value (not measured, no limit in
the profile, or only a constancy limit and no baseline): its ``pass`` is then no
verdict. ``limit`` is the profile's limit as text, ``null`` without one. Further keys
(phantom, tool version, analysis time, baselines, the phantom's fitted ``pose``) may be
added; the ones above keep their
names and meaning.
"""

from __future__ import annotations

import math

from ..session import SessionResult


def _num(v):
    return None if v is None or not math.isfinite(v) else float(v)


def session_json(result: SessionResult, report_path: str | None) -> dict:
    metrics = {}
    for j in result.judged:
        m = j.measurement
        note = m.note
        if j.reason:
            note = f"{note}; {j.reason}" if note else j.reason
        metrics[m.name] = {"value": _num(m.value), "unit": m.unit,
                           "uncertainty": _num(m.uncertainty), "verdict": j.verdict,
                           "note": note,
                           "limit": j.limit_text if j.limit is not None else None,
                           "judged": j.judged, "baseline": _num(j.baseline)}
    return {"unit": result.unit_id, "date": result.date, "profile": result.profile.name,
            "overall": result.overall, "report": None if report_path is None else str(report_path),
            "phantom": result.phantom.name, "tool_version": result.tool_version,
            "analysed": result.analysed, "kind": result.kind,
            "volume": dict(result.meta), "pose": pose_json(result), "metrics": metrics}


def pose_json(result: SessionResult) -> dict | None:
    """Where the phantom was found: shift (mm), turn (deg), mirroring, fit residual (mm)."""
    layout = getattr(result, "layout", None)
    pose = getattr(layout, "pose", None)
    if pose is None:
        return None
    return {"shift_x_mm": _num(pose.shift_xy_mm[0]), "shift_y_mm": _num(pose.shift_xy_mm[1]),
            "shift_z_mm": _num(pose.shift_z_mm), "rotation_deg": _num(pose.rotation_deg),
            "mirrored": bool(pose.mirrored), "residual_mm": _num(pose.residual_mm),
            "fitted_from": list(pose.fitted_from), "note": pose.note}

