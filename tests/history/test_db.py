"""Recording and reading sessions, units, baselines and CSV exports."""

from __future__ import annotations

import math
import sqlite3
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

from qa.errors import InputError
from qa.history.db import SCHEMA_VERSION, History
from qa.history.records import MeasurementRecord, SessionRecord, unit_info_from


def test_open_creates_folder_and_sets_pragmas(tmp_path):
    path = tmp_path / "new" / "folder" / "history.sqlite"
    with History.open(path) as h:
        conn = h._conn
        # WAL, a 30 s busy timeout and foreign keys are what db.py promises to set.
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA busy_timeout").fetchone()[0] == 30000
        assert conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
        with pytest.raises(sqlite3.IntegrityError, match="FOREIGN KEY"):
            conn.execute("INSERT INTO measurements VALUES (999, 0, 'x', 1.0, 'mm', NULL, "
                         "'pass', '', '')")
    assert path.is_file()


def test_round_trip(history, make_session):
    original = make_session(source="scan/0001.dcm", checksum="sha256:ab12",
                            report_path="output/log-2024-03-02.pdf", kind="acceptance")
    sid = history.record(original)
    assert history.load_session(sid) == original
    assert history.measurements(sid) == original.measurements
    (stored,) = history.sessions()
    assert (stored.id, stored.unit_id, stored.kind, stored.n_measurements) == (
        sid, "DBT-NORTH-1", "acceptance", 3)
    assert stored.source == "scan/0001.dcm" and stored.report_path.endswith(".pdf")
    # values survive bit for bit (SQLite REAL is an IEEE double)
    m = MeasurementRecord("nps_peak", 1 / 3, "mm^2", math.pi * 1e-9, "warning")
    sid2 = history.record(replace(make_session(acquired="2024-03-05"), measurements=(m,)))
    assert history.measurements(sid2)[0].value == 1 / 3
    assert history.measurements(sid2)[0].uncertainty == math.pi * 1e-9


def test_sessions_filter_and_order(history, make_session):
    recorded_in_this_order = (
        ("2024-05-01", "A", "wedge-50"), ("2024-01-15T10:30", "A", "wedge-50"),
        ("2024-03-01", "B", "wedge-50"), ("2024-03-01T08:00", "A", "beads"),
        ("2024-03-31T23:59", "A", "wedge-50"))
    for day, unit, phantom in recorded_in_this_order:
        history.record(make_session(unit, day, phantom=phantom))
    assert [s.acquired for s in history.sessions()] == [
        "2024-01-15T10:30:00", "2024-03-01", "2024-03-01T08:00:00", "2024-03-31T23:59:00",
        "2024-05-01"]
    a = history.sessions(unit_id="A", phantom="wedge-50")
    assert [s.acquired[:10] for s in a] == ["2024-01-15", "2024-03-31", "2024-05-01"]
    # since and until are inclusive; a bare date for until covers the whole day
    march = history.sessions(since="2024-03-01", until="2024-03-31")
    assert [(s.unit_id, s.acquired) for s in march] == [
        ("B", "2024-03-01"), ("A", "2024-03-01T08:00:00"), ("A", "2024-03-31T23:59:00")]
    assert len(history.sessions(until="2024-03-31T12:00")) == 3


def test_series_skips_not_measured(history, make_session):
    ids = [history.record(make_session(acquired=f"2024-0{k}-01",
                                       values={"mtf50_x": v, "asf_fwhm": 4.0}))
           for k, v in ((3, 3.0), (1, 3.2), (2, None), (4, 2.9))]
    series = history.series("DBT-NORTH-1", "mtf50_x")
    assert [(p.acquired, p.value, p.session_id) for p in series] == [
        ("2024-01-01", 3.2, ids[1]), ("2024-03-01", 3.0, ids[0]), ("2024-04-01", 2.9, ids[3])]
    assert series[0].uncertainty == pytest.approx(0.032)  # 1 % of the value, see conftest
    assert history.series("DBT-NORTH-1", "mtf50_x", phantom="other") == []


def test_units_keep_latest_facts(history, make_session):
    info = {"manufacturer": "Northwind Imaging", "serial": "NW-0042"}
    history.record(make_session(acquired="2024-02-01", unit_info={**info, "software": "2.1"}))
    history.record(make_session(acquired="2024-06-01", unit_info={**info, "software": "3.0"}))
    # an older session recorded later must not roll the software version back
    history.record(make_session(acquired="2024-01-01",
                                unit_info={"software": "1.9", "room": "X-ray 2"}))
    (unit,) = history.units()
    assert dict(unit.info) == {**info, "software": "3.0", "room": "X-ray 2"}
    assert (unit.first_acquired, unit.last_acquired, unit.n_sessions) == (
        "2024-01-01", "2024-06-01", 3)


def test_patient_identifiers_refused_and_dropped(tmp_path, make_session):
    path = tmp_path / "history.sqlite"
    header = {"Manufacturer": "Northwind Imaging", "DeviceSerialNumber": "NW-0042",
              "PatientName": "DOE^JANE", "PatientID": "PID-77341", "patient_birth": "19600101",
              "StudyInstanceUID": "1.2.3.4"}
    with History.open(path) as h:
        # keys outside the allow-list are refused by name (DICOM keywords included:
        # the caller translates them with unit_info_from)
        with pytest.raises(InputError, match=r"history\.sqlite: unit facts DeviceSerialNumber, "
                                             r"Manufacturer, PatientID, PatientName, "
                                             r"StudyInstanceUID, patient_birth are not "
                                             r"accepted"):
            h.record(make_session(unit_info=header))
        assert h.sessions() == [] and h.units() == []  # the refused session left nothing
        kept = unit_info_from(header)
        assert kept == {"manufacturer": "Northwind Imaging", "serial": "NW-0042"}
        h.record(make_session(unit_info=kept))
    # neither the database nor its WAL holds the identifiers anywhere
    raw = b"".join(p.read_bytes() for p in tmp_path.iterdir() if p.is_file())
    for secret in (b"DOE^JANE", b"PID-77341", b"19600101", b"1.2.3.4"):
        assert secret not in raw


def test_baseline_from_one_session(history, make_session):
    sid = history.record(make_session(values={"mtf50_x": 3.1, "sdnr_d5": None}))
    bid = history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=[sid],
                               reason="acceptance test", set_by="medical physicist")
    base = history.baseline("DBT-NORTH-1", "wedge-50")
    # one session: the value itself, no SD, n = 1; a not-measured metric has no baseline
    assert dict(base) == {"mtf50_x": base["mtf50_x"]}
    assert (base["mtf50_x"].value, base["mtf50_x"].sd, base["mtf50_x"].n,
            base["mtf50_x"].unit) == (3.1, None, 1, "lp/mm")
    (stored,) = history.baseline_history("DBT-NORTH-1", "wedge-50")
    assert (stored.id, stored.session_ids, stored.reason, stored.set_by) == (
        bid, (sid,), "acceptance test", "medical physicist")
    assert stored.superseded_at is None


def test_baseline_mean_of_first_n_and_change(history, make_session):
    values = [3.0, 3.2, 3.1, 3.3, 2.5, 2.6]
    ids = [history.record(make_session(acquired=f"2024-0{k + 1}-01",
                                       values={"mtf50_x": v, "asf_fwhm": 4.0 + k}))
           for k, v in enumerate(values)]
    first = history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=ids[:4],
                                 reason="acceptance", at="2024-04-02T12:00:00+00:00")
    base = history.baseline("DBT-NORTH-1", "wedge-50")
    # mean of 3.0, 3.2, 3.1, 3.3 = 12.6 / 4 = 3.15; deviations -0.15, 0.05, -0.05, 0.15,
    # squares sum 0.05, sample SD sqrt(0.05 / 3) = 0.129099 (closed form)
    assert base["mtf50_x"].value == pytest.approx(3.15, abs=1e-12)
    assert base["mtf50_x"].sd == pytest.approx(math.sqrt(0.05 / 3), rel=1e-12)
    assert base["mtf50_x"].sd == pytest.approx(np.std(values[:4], ddof=1), rel=1e-12)  # numpy
    assert base["asf_fwhm"].value == pytest.approx(5.5)  # (4 + 5 + 6 + 7) / 4
    assert base["mtf50_x"].n == 4
    second = history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=ids[4:],
                                  reason="new detector fitted", set_by="service",
                                  at="2024-06-02T08:00:00+00:00")
    old, new = history.baseline_history("DBT-NORTH-1", "wedge-50")
    assert (old.id, new.id) == (first, second)
    assert (old.superseded_by, old.superseded_at) == (second, new.set_at)
    assert new.reason == "new detector fitted" and new.superseded_at is None
    assert old.values["mtf50_x"].value == pytest.approx(3.15)  # the old one is kept
    # the baseline in force at a date (dates are read as the end of that day, local time,
    # so days well clear of the change times are used here)
    assert history.baseline("DBT-NORTH-1", "wedge-50", at="2024-05-01")[
        "mtf50_x"].value == pytest.approx(3.15)
    assert history.baseline("DBT-NORTH-1", "wedge-50")["mtf50_x"].value == pytest.approx(2.55)
    assert history.baseline("DBT-NORTH-1", "wedge-50", at="2024-03-01") == {}
    with pytest.raises(InputError, match="cannot precede the latest one"):
        history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=ids[:1], reason="late",
                             at="2024-05-01T00:00:00+00:00")


def test_baseline_bad_input(history, make_session):
    a = history.record(make_session())
    b = history.record(make_session(unit_id="OTHER"))
    where = r"history\.sqlite: "
    with pytest.raises(InputError, match=where + "a baseline change needs a reason"):
        history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=[a], reason=" ")
    with pytest.raises(InputError, match=where + "a baseline needs at least one session"):
        history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=[], reason="x")
    with pytest.raises(InputError, match=where + f"session {b} is of unit 'OTHER'"):
        history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=[a, b], reason="x")
    with pytest.raises(InputError, match=where + "no session with id 999"):
        history.set_baseline("DBT-NORTH-1", "wedge-50", session_ids=[999], reason="x")
    with pytest.raises(InputError, match=where + "no session with id 999"):
        history.measurements(999)
    assert history.baseline_history("DBT-NORTH-1", "wedge-50") == []


def test_export_csv(history, make_session, tmp_path):
    history.record(make_session(values={"mtf50_x": 3.1, "asf_fwhm": 4.2, "sdnr_d5": None}))
    history.record(make_session(acquired="2024-04-01", values={"mtf50_x": 3.0, "n1": 1.0,
                                                               "n2": 2.0, "n3": 3.0}))
    history.record(make_session(unit_id="B", values={"mtf50_x": 2.8}))
    out = history.export_csv(tmp_path / "csv" / "all.csv")
    frame = pd.read_csv(out)
    assert len(frame) == 3 + 4 + 1  # one row per measurement
    assert frame["value"].isna().sum() == 1  # the not-measured figure is an empty cell
    assert frame["value"].dtype == np.float64
    assert {"session_id", "unit_id", "acquired", "metric", "unit", "uncertainty", "verdict",
            "limit_text", "unit_manufacturer", "unit_serial"} <= set(frame.columns)
    assert set(frame["unit_serial"]) == {"NW-0042"}
    only_b = pd.read_csv(history.export_csv(tmp_path / "b.csv", unit_id="B"))
    assert list(only_b["metric"]) == ["mtf50_x"] and list(only_b["value"]) == [2.8]
    assert sorted(p.name for p in (tmp_path / "csv").iterdir()) == ["all.csv"]  # no temp file


def test_export_csv_failure_keeps_old_file(history, make_session, tmp_path, monkeypatch):
    history.record(make_session())
    target = tmp_path / "results.csv"
    target.write_text("old,content\n1,2\n")

    def half_written(self, handle, **kwargs):
        handle.write("session_id,unit_id\n1,")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(pd.DataFrame, "to_csv", half_written)
    with pytest.raises(InputError, match=r"results\.csv: cannot write the CSV file"):
        history.export_csv(target)
    assert target.read_text() == "old,content\n1,2\n"
    assert [p.name for p in tmp_path.iterdir() if p.is_file()] == ["results.csv"]


def test_refuses_files_that_are_not_a_history(tmp_path):
    text = tmp_path / "notes.sqlite"
    text.write_bytes(b"this is a text file, not a database\n" * 100)
    with pytest.raises(InputError, match=r"notes\.sqlite: not a usable SQLite database "
                                         r"\(file is not a database\)"):
        History.open(text)
    other = tmp_path / "other.sqlite"
    with sqlite3.connect(other) as conn:
        conn.execute("CREATE TABLE inventory (item TEXT)")
    conn.close()
    with pytest.raises(InputError, match=r"other\.sqlite: an SQLite database but not a "
                                         r"Lacuna history"):
        History.open(other)
    with pytest.raises(InputError, match="expected a database file, found a folder"):
        History.open(tmp_path)


def test_refuses_newer_schema(tmp_path):
    path = tmp_path / "future.sqlite"
    History.open(path).close()
    conn = sqlite3.connect(path)
    with conn:
        conn.execute("INSERT INTO schema_version VALUES (?, 'from a later release', '')",
                     (SCHEMA_VERSION + 1,))
    conn.close()
    with pytest.raises(InputError, match=rf"future\.sqlite: database schema version "
                                         rf"{SCHEMA_VERSION + 1} is newer than this tool's "
                                         rf"\({SCHEMA_VERSION}\)"):
        History.open(path)


def test_record_refuses_other_objects(history):
    with pytest.raises(InputError, match=r"history\.sqlite: expected a SessionRecord, got dict"):
        history.record({"unit_id": "x"})


def test_records_validate_their_fields(make_session):
    with pytest.raises(InputError, match="verdict must be one of pass, warning, fail"):
        MeasurementRecord("mtf50_x", 3.0, "lp/mm", None, "ok")
    with pytest.raises(InputError, match="must have the verdict 'not measured'"):
        MeasurementRecord("mtf50_x", float("nan"), "lp/mm", None, "pass")
    with pytest.raises(InputError, match="field 'acquired'.*ISO date"):
        make_session(acquired="01/03/2024")
    with pytest.raises(InputError, match="kind must be one of"):
        make_session(kind="weekly")
    twice = (MeasurementRecord("a", 1.0, "mm", None, "pass"),) * 2
    with pytest.raises(InputError, match="measurement 'a' appears twice"):
        SessionRecord("U", "2024-01-01", "2024-01-01T10:00", "p", "q", "0.1", "pass", twice)


def test_acquisition_facts_are_kept_per_session_and_exported(history, make_session, tmp_path):
    # Issue requirement: acquisition facts from the header (distance source to detector,
    # scan arc, ...) reach the history; only the keys of ACQUISITION_KEYS, never others.
    from qa.history.records import acquisition_from

    facts = acquisition_from({"views": 15, "half_arc_deg": 12.5, "source_to_image_mm": 650.0,
                              "motion": "step-and-shoot", "PatientName": "Doe^Jane",
                              "source_file": "/exports/Doe/x.dcm"})
    assert facts == {"half_arc_deg": "12.5", "motion": "step-and-shoot",
                     "source_to_image_mm": "650.0", "views": "15"}
    sid = history.record(make_session(acquisition=facts))
    assert history.load_session(sid).acquisition == facts
    (stored,) = history.sessions()
    assert dict(stored.acquisition) == facts
    table = pd.read_csv(history.export_csv(tmp_path / "h.csv"))
    assert set(table["acquisition_views"]) == {15}
    assert set(table["acquisition_half_arc_deg"]) == {12.5}
    with pytest.raises(InputError, match="acquisition facts PatientName are not accepted"):
        history.record(make_session(acquisition={"PatientName": "Doe^Jane"}))
