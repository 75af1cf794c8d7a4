"""Before/after comparison: Welch interval, bootstrap, constancy verdicts, the PDF page.

Check values come from scipy.stats (ttest_ind with equal_var=False and its
confidence_interval; bootstrap with independent resampling) and from the Welch (1947) /
Satterthwaite (1946) formulas worked by hand.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pytest
from scipy import stats

from qa.compare import (bootstrap_interval, compare_figures, compare_metric,
                        compare_sessions, welch_interval)
from qa.errors import InputError
from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord
from qa.judge import load_profile

PROFILE = """\
profile: compare-test
description: invented limits for the tests
limits:
  asf_fwhm:
    unit: mm
    acceptance: {warning: 7.0, action: 9.0}
    constancy: {warning: 0.10, action: 0.20, as: fraction}
    source: invented for the tests
  bead_height_error:
    unit: mm
    constancy: {warning: 0.2, action: 0.4, as: amount}
    source: invented for the tests
"""


@pytest.fixture
def profile(tmp_path):
    p = tmp_path / "limits.yaml"
    p.write_text(PROFILE)
    return load_profile(p)


def test_welch_interval_by_hand():
    # before 1, 2, 3: mean 2, variance 1; after 4, 6, 8: mean 6, variance 4.
    # d = 4; v_a = 4/3, v_b = 1/3, SE = sqrt(5/3) = 1.290994;
    # df = (5/3)^2 / ((4/3)^2 / 2 + (1/3)^2 / 2) = (25/9) / (17/18) = 50/17 = 2.941176
    d, lo, hi, df = welch_interval([1, 2, 3], [4, 6, 8])
    assert d == 4.0
    assert df == pytest.approx(50 / 17, rel=1e-12)
    # t quantile for non-integer df from scipy.stats.t (reference library)
    half = stats.t.ppf(0.975, 50 / 17) * math.sqrt(5 / 3)
    assert (lo, hi) == pytest.approx((4 - half, 4 + half), rel=1e-12)
    # between the table values for 2 and 3 degrees of freedom, t = 4.303 and 3.182
    # (Student's t table, from memory): the half-width lies between 3.182 SE and 4.303 SE
    assert 3.182 * 1.290994 < half < 4.303 * 1.290994


def test_welch_interval_matches_scipy():
    before = [3.02, 2.98, 3.05, 3.01]        # invented MTF50 values, lp/mm
    after = [2.91, 2.95, 2.89, 2.97, 2.93]
    res = stats.ttest_ind(after, before, equal_var=False)
    ci = res.confidence_interval(0.95)
    d, lo, hi, df = welch_interval(before, after)
    # same formula, double precision: agreement to 1e-12 relative
    assert (lo, hi) == pytest.approx((ci.low, ci.high), rel=1e-12)
    assert df == pytest.approx(res.df, rel=1e-12)
    assert d == pytest.approx(np.mean(after) - np.mean(before), rel=1e-12)
    ci90 = res.confidence_interval(0.90)
    assert welch_interval(before, after, level=0.90)[1:3] == pytest.approx(
        (ci90.low, ci90.high), rel=1e-12)


def test_welch_coverage():
    # Welch's interval is approximate; for n = 3 and 5 with SDs 1 and 3 its coverage is
    # close to nominal (Welch 1947). 4000 seeded draws: binomial SE of 0.95 is 0.0034;
    # 0.935..0.965 allows 4 SE plus the approximation's own error (about 0.5 %, from
    # memory). Measured with this seed: 0.9525.
    rng = np.random.default_rng(3)
    hits = 0
    for _ in range(4000):
        b, a = rng.normal(0.0, 1.0, 3), rng.normal(0.5, 3.0, 5)
        _, lo, hi, _ = welch_interval(b, a)
        hits += lo <= 0.5 <= hi
    assert 0.935 < hits / 4000 < 0.965, hits / 4000


def test_bootstrap_matches_scipy():
    rng = np.random.default_rng(11)
    before, after = rng.normal(5.0, 0.2, 30), rng.normal(5.1, 0.3, 30)
    d, lo, hi = bootstrap_interval(before, after, n_resamples=20000, seed=5)
    ref = stats.bootstrap((before, after), lambda b, a, axis: a.mean(axis) - b.mean(axis),
                          n_resamples=20000, method="percentile", vectorized=True,
                          rng=np.random.default_rng(6)).confidence_interval
    # two Monte Carlo estimates of the 2.5 % and 97.5 % points: each has an SE of about
    # sqrt(0.025 * 0.975 / 20000) / pdf(1.96) * SD(diff) = 0.0011 / 0.0584 * 0.058 =
    # 0.0011 mm (SD(diff) = 0.058 mm here); 0.006 mm is 3.9 SE of their difference
    # (measured: 0.0026 and 0.0014 mm)
    assert (lo, hi) == pytest.approx((ref.low, ref.high), abs=0.006)
    assert d == pytest.approx(after.mean() - before.mean(), rel=1e-12)
    # the percentile interval is about the normal interval with the plug-in variance
    # (divisor n, not n - 1) where Welch uses t: width ratio sqrt(29/30) * 1.960 / t,
    # t = t_0.975 at Welch's df (51.7 here) = 2.007, ratio 0.960 (measured 0.963);
    # 2 % allows the Monte Carlo error of the two quantiles (0.0016 / 0.23 = 0.7 %)
    w = welch_interval(before, after)
    expected = math.sqrt(29 / 30) * stats.norm.ppf(0.975) / stats.t.ppf(0.975, w[3])
    assert (hi - lo) / (w[2] - w[1]) == pytest.approx(expected, rel=0.02)


def test_not_computable_and_no_spread():
    one = compare_metric("asf_fwhm", [4.0], [4.2, 4.3], unit="mm")
    assert one.interval is None and one.interval_method == "not computable"
    assert one.verdict == "not computable" and one.mark == "not measured"
    assert "at least 2 values on each side, got 1 before and 2 after" in one.note
    # the means still differ: 4.25 - 4.0 = 0.25 mm (default rel 1e-6: float rounding)
    assert one.difference == pytest.approx(0.25)
    boot = compare_metric("asf_fwhm", [4.0], [4.2, 4.3], unit="mm", method="bootstrap")
    assert boot.interval is None and "a bootstrap needs at least 2" in boot.note
    flat = compare_metric("asf_fwhm", [4.0, 4.0], [4.0, 4.0], unit="mm")
    assert flat.interval is None and "do not vary on either side" in flat.note
    with pytest.raises(InputError, match="unknown method 'ttest'"):
        compare_metric("asf_fwhm", [1, 2], [1, 2], unit="mm", method="ttest")


def test_constancy_and_verdict_words(profile):
    lim = profile.limit_for("asf_fwhm")  # lower is better, 10 % / 20 % of the baseline
    before = [3.9, 4.0, 4.1]             # mean 4.0, SD 0.1
    cases = [
        # after mean, constancy verdict, words (4.5 = +12.5 %, 5.0 = +25 %, 3.0 = -25 %)
        ([4.4, 4.5, 4.6], "warning", "worsened; beyond constancy warning"),
        ([4.9, 5.0, 5.1], "fail", "worsened; beyond constancy action limit"),
        ([2.9, 3.0, 3.1], "pass", "improved; within constancy limit"),
        ([3.95, 4.05, 4.0], "pass", "no change beyond noise; within constancy limit"),
    ]
    for after, constancy, words in cases:
        m = compare_metric("asf_fwhm", before, after, unit="mm", limit=lim)
        assert (m.constancy, m.verdict) == (constancy, words), after
        assert m.beyond_noise == (words != cases[3][2])
    band = compare_metric("bead_height_error", [0.0, 0.1, -0.1], [0.5, 0.6, 0.4], unit="mm",
                          limit=profile.limit_for("bead_height_error"))
    # a band metric: a change of +0.5 mm either way beyond the 0.4 mm action amount
    assert (band.constancy, band.verdict) == ("fail", "changed; beyond constancy action limit")
    # one value before: no interval, but the means still differ by +26 % (> 20 % action)
    lone = compare_metric("asf_fwhm", [4.0], [5.0, 5.08], unit="mm", limit=lim)
    assert (lone.interval, lone.constancy, lone.mark) == (None, "fail", "fail")
    assert lone.verdict == "interval not computable; beyond constancy action limit"
    free = compare_metric("noise_sd", [1.0, 1.1], [1.5, 1.6], unit="value")
    assert free.constancy == "" and free.verdict.endswith("no constancy limit")


def _record(h, unit, day, values, *, phantom="tern", software="2.1"):
    ms = tuple(MeasurementRecord(n, v, "mm", 0.05, "pass") for n, v in values.items())
    return h.record(SessionRecord(unit, day, "2024-12-01T10:00", phantom, "compare-test",
                                  "0.1", "pass", ms, {"software": software}))


def test_compare_sessions(tmp_path, profile):
    with History.open(tmp_path / "h.sqlite") as h:
        b = [_record(h, "U1", f"2024-03-0{k + 1}", {"asf_fwhm": v, "bead_height_error": e})
             for k, (v, e) in enumerate([(4.0, 0.1), (4.1, 0.0), (3.9, 0.05)])]
        a = [_record(h, "U1", f"2024-04-0{k + 1}", {"asf_fwhm": v}, software="3.0")
             for k, v in enumerate([4.9, 5.0, 5.1])]
        other = _record(h, "U2", "2024-04-09", {"asf_fwhm": 1.0})
        elsewhere = _record(h, "U1", "2024-04-10", {"asf_fwhm": 1.0}, phantom="slab")
        c = compare_sessions(h, "U1", b, a, profile=profile)
        assert (c.before_software, c.after_software) == (("2.1",), ("3.0",))
        assert c.after_dates == ("2024-04-01", "2024-04-02", "2024-04-03")
        asf, bead = c.metrics
        # 5.0 - 4.0 = 1.0 mm = +25 % > 20 % (default rel 1e-6: float rounding)
        assert asf.difference == pytest.approx(1.0) and asf.constancy == "fail"
        assert bead.interval is None and len(bead.after) == 0  # not measured after
        assert (c.overall, c.exit_code) == ("fail", 1)
        js = c.to_json()
        assert js["metrics"]["asf_fwhm"]["n_after"] == 3
        assert js["metrics"]["bead_height_error"]["ci_low"] is None
        assert js["before"]["sessions"] == b
        for ids, match in (([99], "no session with id 99"),
                           ([other], f"session {other} is of unit 'U2', not 'U1'"),
                           ([elsewhere], "different phantoms")):
            with pytest.raises(InputError, match=match):
                compare_sessions(h, "U1", b, ids)
        with pytest.raises(InputError, match=f"session\\(s\\) {b[0]} are on both sides"):
            compare_sessions(h, "U1", b, [b[0]] + a)
        with pytest.raises(InputError, match="at least one acquisition on each side"):
            compare_sessions(h, "U1", b, [])


def test_comparison_page_renders(profile):
    pypdf = pytest.importorskip("pypdf")
    from qa.report.compare import render_comparison_pdf

    m = {"asf_fwhm": [4.0, 4.1, 3.9], "bead_height_error": [0.1, 0.0, 0.05]}
    before = [{k: _Fig(v[i]) for k, v in m.items()} for i in range(3)]
    after = [{"asf_fwhm": _Fig(x), "bead_height_error": _Fig(0.0)} for x in (4.4, 4.5, 4.6)]
    c = compare_figures("U1", "tern", before, after, before_ids=[1, 2, 3],
                        after_ids=[4, 5, 6], profile=profile)
    pdf = render_comparison_pdf(c, created="2024-12-01")
    text = " ".join(p.extract_text() for p in pypdf.PdfReader(io.BytesIO(pdf)).pages)
    text = " ".join(text.split())
    for words in ("Before and after — unit U1, phantom tern", "Welch t, 95 %",
                  "worsened; beyond constancy warning", "Worst constancy verdict: warning",
                  "qualified medical physicist"):
        assert words in text, words


class _Fig:
    def __init__(self, value, unit="mm"):
        self.value, self.unit = value, unit


def test_interval_level_checked():
    with pytest.raises(InputError, match="confidence level must lie between 0 and 1"):
        welch_interval([1, 2], [3, 4], level=95)
    with pytest.raises(InputError, match="confidence level must lie between 0 and 1"):
        compare_metric("asf_fwhm", [1.0], [2.0], unit="mm", level=0.0)  # not swallowed
