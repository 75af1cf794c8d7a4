"""Fixtures of the history tests: a fresh database and a maker of sessions."""

from __future__ import annotations

import pytest

from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord


def session_for(unit_id="DBT-NORTH-1", acquired="2024-03-01", *, values=None,
                phantom="wedge-50", kind="routine", unit_info=None, **extra) -> SessionRecord:
    """A session of invented data; ``values`` maps metric name to value (None: not measured)."""
    if values is None:
        values = {"mtf50_x": 3.1, "asf_fwhm": 4.2, "sdnr_d5": None}
    measurements = tuple(
        MeasurementRecord(name, value, "lp/mm" if name.startswith("mtf") else "mm",
                          None if value is None else 0.01 * abs(value),
                          "not measured" if value is None else "pass",
                          note="insert not found within 5 mm" if value is None else "",
                          limit_text="" if value is None else ">= 2.0 (local policy)")
        for name, value in values.items())
    return SessionRecord(
        unit_id=unit_id, acquired=acquired, analysed=extra.pop("analysed", "2024-03-02T09:00"),
        phantom=phantom, profile="constancy-v1", tool_version="0.1.0",
        overall=extra.pop("overall", "pass"), measurements=measurements,
        unit_info={"manufacturer": "Northwind Imaging", "model": "T-500",
                   "serial": "NW-0042", "software": "2.1"} if unit_info is None else unit_info,
        kind=kind, **extra)


@pytest.fixture
def make_session():
    return session_for


@pytest.fixture
def history(tmp_path):
    with History.open(tmp_path / "output" / "history.sqlite") as h:
        yield h
