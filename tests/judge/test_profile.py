"""Threshold profiles: validation on load and verdicts."""

import textwrap

import pytest

from qa import PROJECT_ROOT
from qa.cli import main
from qa.errors import InputError
from qa.judge import judge, load_profile, overall
from qa.measure.base import Measurement

PHANTOM = PROJECT_ROOT / "phantoms" / "lacuna-dbt-demo.yaml"

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
  mtf50_x:
    unit: lp/mm
    acceptance: {warning: 1.5, action: 1.3}
    source: local policy (test)
"""


def write(tmp_path, text):
    p = tmp_path / "limits.yaml"
    p.write_text(textwrap.dedent(text))
    return p


def test_good_profile_loads(tmp_path):
    prof = load_profile(write(tmp_path, GOOD))
    assert prof.name == "t" and len(prof.limits) == 3
    assert prof.limit_for("asf_fwhm").better == "lower"
    assert prof.limit_for("mtf50_x").better == "higher"


# Each malformed profile: (text replaced, replacement, line, field, what the message says).
# Lines count from 1 in GOOD: asf_fwhm at 5 (unit 6, acceptance 7, constancy 8),
# streak_half_angle at 10 (acceptance 12), mtf50_x at 14 (acceptance 16).
BAD = {
    "unknown metric": ("asf_fwhm:", "asf_fwhmm:", 5, "limits.asf_fwhmm",
                       "unknown metric 'asf_fwhmm' (no metric family declares it)"),
    "unit mismatch": ("unit: mm", "unit: cm", 6, "limits.asf_fwhm.unit",
                      "metric 'asf_fwhm' is measured in 'mm', the profile says 'cm'"),
    "missing acceptance level": (
        "{warning: 8.0, action: 10.0}", "{warning: 8.0}", 7, "limits.asf_fwhm.acceptance",
        "missing required field 'limits.asf_fwhm.acceptance.action'"),
    "missing constancy level": (
        "{warning: 0.1, action: 0.2, as: fraction}", "{action: 0.2, as: fraction}", 8,
        "limits.asf_fwhm.constancy",
        "missing required field 'limits.asf_fwhm.constancy.warning'"),
    "no level at all": (
        "    acceptance: {warning: 8.0, action: 10.0}\n    constancy: {warning: 0.1, "
        "action: 0.2, as: fraction}\n", "", 5, "limits.asf_fwhm",
        "metric 'asf_fwhm' needs an 'acceptance' or a 'constancy' limit"),
    "lower is better, warning beyond action": (
        "{warning: 8.0, action: 10.0}", "{warning: 11.0, action: 10.0}", 7,
        "limits.asf_fwhm.acceptance.warning",
        "the warning level (11) must be at or below the action level (10) for a metric "
        "where lower is better"),
    "higher is better, warning beyond action": (
        "{warning: 1.5, action: 1.3}", "{warning: 1.2, action: 1.3}", 16,
        "limits.mtf50_x.acceptance.warning",
        "the warning level (1.2) must be at or above the action level (1.3) for a metric "
        "where higher is better"),
    "constancy warning beyond action": (
        "{warning: 0.1, action: 0.2, as: fraction}", "{warning: 0.3, action: 0.2}", 8,
        "limits.asf_fwhm.constancy.warning",
        "the warning change (0.3) must not exceed the action change (0.2)"),
    "band warning outside action": (
        "[11, 14], action: [10, 15]", "[9, 14], action: [10, 15]", 12,
        "limits.streak_half_angle.acceptance.warning",
        "the warning band [9.0, 14.0] must lie inside the action band [10.0, 15.0]"),
    "unknown constancy kind": ("as: fraction", "as: percent", 8,
                               "limits.asf_fwhm.constancy.as", "expected one of fraction, amount"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_profiles_are_refused_with_file_line_and_field(tmp_path, case):
    old, new, line, field, what = BAD[case]
    assert old in GOOD
    path = write(tmp_path, GOOD.replace(old, new, 1))
    with pytest.raises(InputError) as info:
        load_profile(path)
    err = info.value
    assert (err.source, err.line, err.field) == (str(path), line, field), err.one_line()
    assert err.message.startswith(what), err.message
    assert err.one_line() == f"{path}:{line}, field '{field}': {err.message}"


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_profiles_exit_2_on_the_command_line(tmp_path, capsys, monkeypatch, case):
    # The profile is read before the volume, so a volume that does not exist is never
    # reached; nothing is written (no output folder, no history).
    old, new, line, field, what = BAD[case]
    path = write(tmp_path, GOOD.replace(old, new, 1))
    monkeypatch.chdir(tmp_path)
    code = main(["assess", "none.npz", "--phantom", str(PHANTOM), "--limits", str(path)])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("lacuna: error: "), err
    assert f"{path}:{line}, field '{field}': {what}" in err, err
    assert not (tmp_path / "output").exists()


@pytest.mark.parametrize("old,new,match", [
    ("    source: local policy (test)\n  streak", "    sauce: x\n    source: y\n  streak", r"limits.yaml:9, field 'limits.asf_fwhm.sauce': unknown field 'limits.asf_fwhm.sauce'"),
    ("profile: t", "profile: !!python/object:os.system t", r"YAML tag not allowed"),
    ("limits:\n", "limits: [\n", r"not valid YAML"),
])
def test_malformed_files_are_refused(tmp_path, old, new, match):
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


def test_scope_of_phantoms_and_geometries(tmp_path):
    text = GOOD.replace("applies_to: {phantoms: [p1]}",
                        "applies_to:\n  phantoms: [p1, p2]\n  geometries: [g-mid, g-wide]")
    path = write(tmp_path, text)
    prof = load_profile(path)
    assert prof.phantoms == ("p1", "p2") and prof.geometries == ("g-mid", "g-wide")
    prof.check_applies(phantom="p2", geometry="g-wide")
    with pytest.raises(InputError) as info:
        prof.check_applies(phantom="p1", geometry="g-narrow")
    assert info.value.one_line() == (f"{path}:5, field 'applies_to.geometries': profile 't' "
                                     "is for geometr(ies) g-mid, g-wide, not 'g-narrow'")
    with pytest.raises(InputError) as info:
        prof.check_applies(phantom="p3", geometry="g-mid")
    assert info.value.one_line() == (f"{path}:4, field 'applies_to.phantoms': profile 't' "
                                     "is for phantom(s) p1, p2, not 'p3'")
    # A volume that does not name its geometry (a scanner's DICOM) is not refused, and
    # the note says the scope was not checked.
    prof.check_applies(phantom="p1", geometry=None)
    assert "does not state its acquisition geometry" in prof.geometry_note(None)
    assert "g-mid, g-wide" in prof.geometry_note("")
    assert prof.geometry_note("g-mid") == ""
    # A profile without geometries takes any, and has nothing to note.
    plain = load_profile(write(tmp_path, GOOD))
    plain.check_applies(phantom="p1", geometry="anything")
    assert plain.geometries == () and plain.geometry_note(None) == ""


SHIPPED = sorted((PROJECT_ROOT / "thresholds").glob("*.yaml"))
#: How a shipped limit may name its source (DEVELOPERS.md, "Tests"; README, profiles).
SOURCE_KINDS = ("local policy", "common practice", "from memory", "invented for the demo")


def _names(folder, key):
    from qa.yamlio import load_yaml
    return {load_yaml(p)[key] for p in folder.glob("*.yaml")}


@pytest.mark.parametrize("path", SHIPPED, ids=lambda p: p.name)
def test_shipped_profiles_load_and_state_their_scope_and_sources(path):
    prof = load_profile(path)
    phantoms = _names(PROJECT_ROOT / "phantoms", "phantom")
    geometries = _names(PROJECT_ROOT / "phantoms" / "geometries", "geometry")
    assert prof.phantoms and set(prof.phantoms) <= phantoms, prof.phantoms
    assert prof.geometries and set(prof.geometries) <= geometries, prof.geometries
    for limit in prof.limits:
        assert limit.source.startswith(SOURCE_KINDS), (limit.key, limit.source)


def test_acceptance_and_constancy_profiles_ship():
    acceptance = load_profile(PROJECT_ROOT / "thresholds" / "dbt-acceptance.yaml")
    constancy = load_profile(PROJECT_ROOT / "thresholds" / "dbt-constancy.yaml")
    assert all(lim.acceptance is not None and lim.constancy is None
               for lim in acceptance.limits)
    assert all(lim.constancy is not None and lim.acceptance is None
               for lim in constancy.limits)
    # The MTF constancy levels are the common-practice 10 % / 20 % falls from baseline.
    mtf = constancy.limit_for("mtf50_x")
    assert (mtf.constancy.warning, mtf.constancy.action, mtf.constancy_as) == \
        (0.10, 0.20, "fraction")
    assert mtf.source.startswith("common practice")
