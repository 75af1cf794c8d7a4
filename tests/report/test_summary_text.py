"""The log's summary table, read back as a reader of the PDF sees it, against the JSON.

The PDF is read with pypdf (a reference reader) and the table parsed here from the printed
text alone, without Lacuna's formatting code: each metric's row must give the JSON's
value, uncertainty and baseline to the precision printed, the change from the baseline
(in per cent where the constancy limit is relative), the unit and the verdict word.
:func:`check_summary` is also run on the demo's log by ``tests/cli/test_end_to_end.py``.
"""

from __future__ import annotations

import io
import re

import pytest

pypdf = pytest.importorskip("pypdf")

VERDICT_WORDS = ("not measured", "no limit", "not judged", "pass", "warning", "fail")
#: How the table prints units that are not words (README: "1" is dimensionless, "value"
#: the volume's own grey-value units).
PRINTED_UNIT = {"1": "—", "value": "vol. units"}
_NUMBER = r"-?\d+(?:\.\d+)?"
_ROW = re.compile(
    rf"^(?P<value>{_NUMBER}|—)(?: ± (?P<u>\d+(?:\.\d+)?))? (?P<unit>.+?) "
    rf"(?P<verdict>{'|'.join(VERDICT_WORDS)}) (?P<base>{_NUMBER}|—) "
    rf"(?P<change>[+-]\d+(?:\.\d+)?(?: %)?|—)(?: (?P<limits>.*))?$")
_HEADER = ("Metric", "Value ± u", "Unit", "Verdict", "Baseline", "Change", "Limits")


def pdf_text(data: bytes) -> str:
    return "\n".join(p.extract_text() for p in pypdf.PdfReader(io.BytesIO(data)).pages)


def summary_rows(text: str, names) -> dict[str, dict]:
    """The summary table's rows, parsed from the text: ``{metric: fields}``.

    The table runs from the line "Summary" to the note that starts "u: one standard
    uncertainty"; page footers and repeated header rows are dropped; a row is the lines
    from a metric's name to the next name (a cell may wrap onto more lines).
    """
    start = text.index("\nSummary\n")
    end = text.index("\nu: one standard uncertainty", start)
    lines = [ln.strip() for ln in text[start:end].splitlines()[2:]]
    lines = [ln for ln in lines if ln and ln not in _HEADER
             and not re.fullmatch(r"page \d+ of \d+", ln)
             and not ln.startswith("Lacuna QA log ·")]
    lines = lines[1:] if lines and lines[0].startswith("Overall:") else lines
    rows, current = {}, None
    for ln in lines:
        if ln in names:
            assert ln not in rows, f"{ln}: two rows"
            current = rows.setdefault(ln, [])
            continue
        assert current is not None, f"text before the first row: {ln!r}"
        current.append(ln)
    parsed = {}
    for name, cells in rows.items():
        m = _ROW.match(" ".join(cells))
        assert m, (name, cells)
        parsed[name] = m.groupdict()
    return parsed


def _decimals(text: str) -> int:
    return len(text.partition(".")[2])


def _close(printed: str, want: float, what: str) -> None:
    half = 0.5 * 10.0 ** -_decimals(printed)
    assert abs(float(printed) - want) <= half * (1 + 1e-9) + 1e-15, (what, printed, want)


def _significant_digits(text: str) -> int:
    return len(text.replace(".", "").lstrip("0"))


def check_summary(text: str, data: dict) -> int:
    """Check every metric of the JSON ``data`` against its row; returns the rows checked."""
    metrics = data["metrics"]
    rows = summary_rows(text, set(metrics))
    assert set(rows) == set(metrics), set(metrics) ^ set(rows)
    for name, m in metrics.items():
        row = rows[name]
        # verdict word: the JSON's, except a figure no level was applied to
        if m["judged"] or m["verdict"] == "not measured":
            word = m["verdict"]
        else:
            word = "no limit" if m["limit"] is None else "not judged"
        assert row["verdict"] == word, (name, row["verdict"], word)
        assert row["unit"] == PRINTED_UNIT.get(m["unit"], m["unit"]), (name, row["unit"])
        if m["value"] is None:
            assert row["value"] == "—" and row["u"] is None, (name, row)
            continue
        _close(row["value"], m["value"], f"{name} value")
        if m["uncertainty"] is None:
            assert row["u"] is None, (name, row)
        else:
            # value and uncertainty to the same place, the uncertainty to (at least) two
            # significant digits: the usual quoting of a standard uncertainty
            assert _decimals(row["u"]) == _decimals(row["value"]), (name, row)
            assert _significant_digits(row["u"]) >= 2 or _decimals(row["u"]) == 10, (name, row)
            _close(row["u"], m["uncertainty"], f"{name} uncertainty")
        base = m.get("baseline")
        if base is None:
            assert (row["base"], row["change"]) == ("—", "—"), (name, row)
            continue
        assert _decimals(row["base"]) == _decimals(row["value"]), (name, row)
        _close(row["base"], base, f"{name} baseline")
        relative = m["limit"] is not None and re.search(r"baseline \w+: .*%", m["limit"])
        if relative:
            assert row["change"].endswith(" %"), (name, row["change"])
            _close(row["change"][:-2], 100.0 * (m["value"] - base) / abs(base),
                   f"{name} change")
        else:
            assert not row["change"].endswith("%"), (name, row["change"])
            _close(row["change"], m["value"] - base, f"{name} change")
    counted = re.search(r"Overall: \w+ — (\d+) pass, (\d+) warning, (\d+) fail, "
                        r"(\d+) not measured", " ".join(text.split()))
    assert counted, "no verdict counts"
    judged = [m for m in metrics.values() if m["judged"]]
    want = [sum(m["verdict"] == v for m in judged) for v in ("pass", "warning", "fail")]
    assert [int(g) for g in counted.groups()[:3]] == want
    return len(rows)


# --- a log made for the check -------------------------------------------------------------

PROFILE = """\
profile: text-test
description: invented limits for the tests
limits:
  mtf50_x:
    unit: lp/mm
    acceptance: {warning: 1.5, action: 1.3}
    constancy: {warning: 0.05, action: 0.10, as: fraction}
    source: invented for the tests
  asf_fwhm:
    unit: mm
    constancy: {warning: 0.10, action: 0.20, as: fraction}
    source: invented for the tests
  bead_height_error:
    unit: mm
    acceptance: {warning: [-0.5, 0.5], action: [-1.0, 1.0]}
    constancy: {warning: 0.2, action: 0.4, as: amount}
    source: invented for the tests
  streak_half_angle:
    unit: deg
    acceptance: {warning: [12.0, 14.5], action: [11.0, 15.5]}
    source: invented for the tests
  sdnr_*:
    unit: "1"
    acceptance: {warning: 0.3, action: 0.15}
    source: invented for the tests
  noise_sd:
    unit: value
    constancy: {warning: 0.2, action: 0.5, as: fraction}
    source: invented for the tests
  uniformity:
    unit: "%"
    acceptance: {warning: 2, action: 5}
    source: invented for the tests
"""

#: (name, value, unit, uncertainty, baseline): magnitudes from 1e-4 to 1e3, negative
#: values and baselines, a zero, no uncertainty, a figure not measured, figures with and
#: without a limit, with and without a baseline.
FIGURES = (
    ("mtf50_x", 1.68558431, "lp/mm", 0.0059123, 1.69833103),
    ("mtf10_x", 2.19216346, "lp/mm", 0.00412, None),
    ("mtf50_y", 5.71556450, "lp/mm", 0.7271, 7.34198443),
    ("asf_fwhm", 5.79780559, "mm", 0.0153, None),
    ("bead_height_error", 0.0, "mm", 0.0086, -0.0099999),
    ("streak_half_angle", 13.0947178, "deg", 0.01813, 13.1300889),
    ("streak_ghost_spacing", None, "mm", None, 0.6438520),
    ("coverage_half_arc", 13.1302828, "deg", None, 13.1715058),
    ("sdnr_d6", 0.44796220, "1", 0.04866, 0.57316385),
    ("sdnr_d0.8", 0.34344521, "1", 0.25, 0.79550153),
    ("threshold_contrast_d6", 0.0000599329, "value", 0.0000131, 0.0000494439),
    ("noise_sd", 0.00091940868, "value", 0.0000047, 0.00066091539),
    ("uniformity", 0.050000032, "%", 0.00723, 0.046909192),
    ("dprime_npw_d6", 1234.5678, "1", 12.3, -17.25),
)


@pytest.fixture
def log(tmp_path):
    from qa.judge import judge, load_profile
    from qa.locate.layout import Layout
    from qa.measure.base import Measurement
    from qa.phantom.model import Phantom
    from qa.report.jsonout import session_json
    from qa.report.pdf import render_pdf
    from qa.session import SessionResult

    path = tmp_path / "limits.yaml"
    path.write_text(PROFILE)
    profile = load_profile(path)
    judged = []
    for name, value, unit, u, base in FIGURES:
        m = Measurement(name, value, unit, u) if value is not None else \
            Measurement.missing(name, unit, "not measured: made so for the test")
        judged.append(judge(m, profile.limit_for(name), base))
    phantom = Phantom("tern", "test phantom", 20.0, ())
    result = SessionResult("FEN-DBT-1", "2024-12-02", "2024-12-02T10:00:00", phantom,
                           profile, (), tuple(judged), "warning", Layout(phantom, {}))
    return render_pdf(result, None), session_json(result, "log.pdf")


def test_every_row_matches_the_json(log):
    pdf, data = log
    assert check_summary(pdf_text(pdf), data) == len(FIGURES)


def test_figures_without_a_limit_are_no_passes(log):
    pdf, data = log
    m = data["metrics"]
    # the JSON keeps the contract's word, and says that nothing was judged
    assert (m["coverage_half_arc"]["verdict"], m["coverage_half_arc"]["judged"],
            m["coverage_half_arc"]["limit"]) == ("pass", False, None)
    assert m["mtf50_x"]["judged"] is True and "act below 1.3" in m["mtf50_x"]["limit"]
    # constancy-only limit and no baseline: a limit, but not judged
    assert (m["asf_fwhm"]["judged"], m["asf_fwhm"]["limit"] is not None) == (False, True)
    assert m["streak_ghost_spacing"]["judged"] is False
    rows = summary_rows(pdf_text(pdf), set(m))
    assert rows["coverage_half_arc"]["verdict"] == "no limit"
    assert rows["threshold_contrast_d6"]["verdict"] == "no limit"
    assert rows["asf_fwhm"]["verdict"] == "not judged"
    text = " ".join(pdf_text(pdf).split())
    passes = sum(v["verdict"] == "pass" and v["judged"] for v in m.values())
    free = sum(not v["judged"] and v["verdict"] != "not measured" for v in m.values())
    assert f"{passes} pass," in text and f"{free} reported without a verdict" in text


def test_the_parser_refuses_a_wrong_number(log):
    pdf, data = log
    text = pdf_text(pdf)
    wrong = dict(data, metrics=dict(data["metrics"]))
    wrong["metrics"]["mtf50_x"] = dict(wrong["metrics"]["mtf50_x"], value=1.6866)
    with pytest.raises(AssertionError, match="mtf50_x value"):
        check_summary(text, wrong)
    wrong["metrics"]["mtf50_x"] = dict(data["metrics"]["mtf50_x"], baseline=1.6993)
    with pytest.raises(AssertionError, match="mtf50_x baseline"):
        check_summary(text, wrong)
