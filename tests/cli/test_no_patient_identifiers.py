"""Patient identifiers in a DICOM header and its path reach no output of ``lacuna assess``.

A small demo volume is written as DICOM under a folder tree named the way exports often
are (patient name, birth date, patient ID, accession number, referring physician), its
header is given the same identifiers, and it is assessed with the history on and JSON
on. The PDF log's text and metadata, the JSON file, the history database (raw bytes of
every file of it and every text column) and the CSV export of ``lacuna history`` must
hold none of them (README: "Patient identifiers found in DICOM headers never reach a
log, a JSON file or the history database"; the identifiers are those of DICOM PS3.15
Table E.1-1). All names and numbers below are invented.
"""

import dataclasses
import json
import sqlite3

import pydicom
import pytest
from pypdf import PdfReader

from qa import PROJECT_ROOT
from qa.cli import main
from qa.io import write_dicom
from qa.phantom import load_phantom
from qa.simulate.acquire import detect, expected_transmissions
from qa.simulate.geometry import Detector
from qa.simulate.profiles import load_geometry
from qa.simulate.recon import reconstruct
from qa.simulate.recon.grid import ReconGrid

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"
LIMITS = PROJECT_ROOT / "thresholds" / "demo.yaml"
HEADER = {
    "PatientName": "Vantongeren^Philippa^Hestia",
    "PatientID": "MRN004217",
    "PatientBirthDate": "19610203",
    "AccessionNumber": "A20260302117",
    "ReferringPhysicianName": "Okonkwo^Adaeze",
    "OtherPatientIDs": ["ALT55120", "NHS4857773456"],
}
#: What must not appear anywhere: every name component (the scrubber's rule cuts those
#: of three characters or more), every ID, and the birth date as DICOM and ISO spell it.
NEEDLES = ("Vantongeren", "Philippa", "Hestia", "Okonkwo", "Adaeze", "MRN004217",
           "A20260302117", "ALT55120", "NHS4857773456", "19610203", "1961-02-03")
#: An export tree: <name>_<birth date>_<ID>/<study date>_<accession>_<referrer>/<file>.
FOLDERS = ("VANTONGEREN_PHILIPPA_1961-02-03_MRN004217", "20260302_A20260302117_Okonkwo")
FILE_NAME = "dbt_ALT55120.dcm"


def found_in(text: str) -> list[str]:
    low = text.lower()
    return [n for n in NEEDLES if n.lower() in low]


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    """The assessed session's outputs: (PDF, JSON, history database, CSV, stdout)."""
    ph = load_phantom(PHANTOM)
    g = load_geometry(PROJECT_ROOT / "phantoms" / "geometries" / "dbt-mid-arc.yaml")
    # A coarse 0.2 mm grid (as tests/batch/test_batch.py) keeps the run to seconds.
    g = dataclasses.replace(g, detector=Detector(0.2, 450, 330, (-44.9, -7.9)),
                            aperture_samples=1)
    grid = ReconGrid.from_field(*ph.field_xyz_mm, pixel_mm=0.2, plane_mm=1.0)
    vol = reconstruct(detect(expected_transmissions(ph, g), g, seed=3), grid, method="fbp")
    root = tmp_path_factory.mktemp("exports")
    path = write_dicom(vol.with_meta(serial="FEN-DBT-1", acquired="2026-03-02"),
                       root.joinpath(*FOLDERS, FILE_NAME))
    ds = pydicom.dcmread(path)
    for keyword, value in HEADER.items():
        setattr(ds, keyword, value)
    ds.save_as(path)
    out = tmp_path_factory.mktemp("results")
    return path, out


def test_identifiers_reach_no_output(session, capsys):
    path, out = session
    # The input really carries every identifier (else the check below could not fail).
    raw = path.read_bytes().decode("latin-1") + str(path)
    assert set(found_in(raw)) == set(NEEDLES)

    js, db, csv = out / "results.json", out / "history.sqlite", out / "history.csv"
    code = main(["assess", str(path), "--phantom", str(PHANTOM), "--limits", str(LIMITS),
                 "--out", str(out), "--json", str(js)])
    assert code in (0, 1)
    assert main(["history", "--db", str(db), "--csv", str(csv)]) == 0
    printed = capsys.readouterr()

    result = json.loads(js.read_text(encoding="utf-8"))
    assert result["unit"] == "FEN-DBT-1"                   # from the header's serial
    source = result["volume"]["source_file"]               # the path went through, scrubbed
    assert source.endswith(".dcm") and "[patient]" in source

    pdf = PdfReader(result["report"])
    texts = {
        "PDF text": "\n".join(page.extract_text() for page in pdf.pages),
        "PDF metadata": json.dumps({k: str(v) for k, v in (pdf.metadata or {}).items()}),
        "JSON": js.read_text(encoding="utf-8"),
        "CSV": csv.read_text(encoding="utf-8"),
        "standard output": printed.out + printed.err,
    }
    # Every file of the database (its journal too, if one was left), as raw bytes in
    # SQLite's text encodings, UTF-8 and UTF-16 (https://sqlite.org/fileformat.html).
    files = sorted(out.glob("history.sqlite*"))
    assert db in files
    for f in files:
        data = f.read_bytes()
        texts[f"{f.name} (UTF-8)"] = data.decode("utf-8", errors="replace")
        texts[f"{f.name} (UTF-16)"] = data.decode("utf-16-le", errors="replace") + \
            data[1:].decode("utf-16-le", errors="replace")
    # ... and every text (or blob) value of every table.
    with sqlite3.connect(db) as con:
        tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")]
        assert tables
        for table in tables:
            cells = [c.decode("latin-1") if isinstance(c, bytes) else c
                     for row in con.execute(f'SELECT * FROM "{table}"') for c in row
                     if isinstance(c, (str, bytes))]
            texts[f"table {table}"] = "\n".join(cells)
    # What was searched holds the session (so an empty export could not pass).
    assert "FEN-DBT-1" in texts["CSV"] and "FEN-DBT-1" in texts["PDF text"]
    assert any("FEN-DBT-1" in texts[f"table {t}"] for t in tables)
    assert any(source in texts[f"table {t}"] for t in tables)

    leaks = {where: hits for where, text in texts.items() if (hits := found_in(text))}
    assert not leaks, leaks


def test_identifiers_reach_no_batch_output(session, tmp_path, capsys):
    # The same export tree through `lacuna batch`, with a second, truncated copy of the
    # file in another patient-named folder: the failure line and the summary CSV name
    # the source, and must name it scrubbed, as the session's metadata does.
    path, _ = session
    root = path.parents[len(FOLDERS) - 1]
    broken = root / "PHILIPPA_VANTONGEREN_MRN004217" / "dbt_NHS4857773456.dcm"
    broken.parent.mkdir()
    data = path.read_bytes()
    broken.write_bytes(data[: len(data) * 2 // 3])
    out, summary = tmp_path / "out", tmp_path / "summary.csv"
    code = main(["batch", str(root), "--phantom", str(PHANTOM), "--limits", str(LIMITS),
                 "--out", str(out), "--quiet", "--summary", str(summary), "--no-history"])
    printed = capsys.readouterr()
    assert code == 2 and "1 assessed, 1 failed" in printed.out, printed.out
    table = summary.read_text(encoding="utf-8")
    assert "[patient]" in table
    for where, text in {"summary CSV": table, "standard output": printed.out + printed.err}.items():
        assert found_in(text) == [], (where, found_in(text))
