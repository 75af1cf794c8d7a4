"""Threshold profiles: validation on load and verdicts."""

import textwrap

import pytest

from qa.errors import InputError
from qa.judge import judge, load_profile, overall
from qa.measure.base import Measurement

GOOD = """\
profile: t
description: test profile
applies_to: {phantoms: [p1]}
limits:
  asf_fwhm:
    unit: mm
    acceptance: {warning: 8.0, action: 10.0}
    constancy: {warning: 0.1, action: 0.2, as: fraction}
    source: local policy (test)
  streak_half_angle:
    unit: deg
    acceptance: {warning: [11, 14], action: [10, 15]}
    source: local policy (test)
"""


def write(tmp_path, text):
    p = tmp_path / "limits.yaml"
    p.write_text(textwrap.dedent(text))
    return p


def test_good_profile_loads(tmp_path):
    prof = load_profile(write(tmp_path, GOOD))
    assert prof.name == "t" and len(prof.limits) == 2
    assert prof.limit_for("asf_fwhm").better == "lower"


@pytest.mark.parametrize("old,new,match", [
    ("asf_fwhm:", "asf_fwhmm:", r"limits.yaml:5, field 'limits.asf_fwhmm': unknown metric"),
    ("unit: mm", "unit: cm", r"field 'limits.asf_fwhm.unit': metric 'asf_fwhm' is measured in 'mm'"),
    ("{warning: 8.0, action: 10.0}", "{warning: 11.0, action: 10.0}", r"warning level \(11\) must be at or below"),
    ("{warning: 8.0, action: 10.0}", "{warning: 8.0}", r"missing required field 'limits.asf_fwhm.acceptance.action'"),
    ("[11, 14], action: [10, 15]", "[9, 14], action: [10, 15]", r"must lie inside the action band"),
    ("as: fraction", "as: percent", r"expected one of fraction, amount"),
    ("    source: local policy (test)\n  streak", "    sauce: x\n    source: y\n  streak", r"unknown field 'limits.asf_fwhm.sauce'"),
    ("profile: t", "profile: !!python/object:os.system t", r"YAML tag not allowed"),
    ("limits:\n", "limits: [\n", r"not valid YAML"),
])
def test_bad_profiles_are_refused_with_file_line_and_field(tmp_path, old, new, match):
    assert old in GOOD
    with pytest.raises(InputError, match=match):
        load_profile(write(tmp_path, GOOD.replace(old, new, 1)))


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"nothere.yaml: file not found"):
        load_profile(tmp_path / "nothere.yaml")


def test_verdicts(tmp_path):
    prof = load_profile(write(tmp_path, GOOD))
    asf = prof.limit_for("asf_fwhm")
    band = prof.limit_for("streak_half_angle")
    m = lambda name, v, unit="mm": Measurement(name, v, unit, 0.1)  # noqa: E731
    assert judge(m("asf_fwhm", 7.0), asf).verdict == "pass"
    assert judge(m("asf_fwhm", 9.0), asf).verdict == "warning"
    assert judge(m("asf_fwhm", 10.5), asf).verdict == "fail"
    # Constancy: 7.0 against a baseline of 6.0 is a 16.7 % rise -> warning (10-20 %).
    j = judge(m("asf_fwhm", 7.0), asf, baseline=6.0)
    assert j.verdict == "warning" and j.change == pytest.approx(1.0)
    assert judge(m("asf_fwhm", 7.5), asf, baseline=6.0).verdict == "fail"
    # Lower is better: a fall from the baseline is no constancy problem.
    assert judge(m("asf_fwhm", 4.0), asf, baseline=6.0).verdict == "pass"
    assert judge(m("streak_half_angle", 12.0, "deg"), band).verdict == "pass"
    assert judge(m("streak_half_angle", 10.5, "deg"), band).verdict == "warning"
    assert judge(m("streak_half_angle", 15.5, "deg"), band).verdict == "fail"
    missing = judge(Measurement.missing("asf_fwhm", "mm", "bead not found"), asf)
    assert missing.verdict == "not measured"
    # A limited metric that was not measured makes the session a warning, not a pass.
    assert overall([judge(m("asf_fwhm", 7.0), asf), missing]) == "warning"
    assert overall([judge(m("asf_fwhm", 10.5), asf), missing]) == "fail"
