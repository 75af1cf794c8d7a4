"""Trend views: baseline in force, profile limits around it, control limits and flags.

Control-chart formulas from D. C. Montgomery, Introduction to Statistical Quality Control
(Wiley): individuals chart (centre = mean, sigma = mean moving range / d2, d2 = 1.128 for
spans of 2), EWMA z_i = lambda x_i + (1 - lambda) z_{i-1} with limits
centre +- L sigma sqrt(lambda / (2 - lambda) [1 - (1 - lambda)^(2i)]); run rules of the
Western Electric Statistical Quality Control Handbook (1956).
"""

from __future__ import annotations

import textwrap
from dataclasses import replace
from datetime import date, timedelta
from types import SimpleNamespace

import numpy as np
import pytest

from qa.errors import InputError
from qa.history.control import BEYOND_3, EWMA_BEYOND, TWO_OF_THREE
from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord
from qa.history.trends import (OUTSIDE_ACTION, OUTSIDE_WARNING, LimitLine, limit_lines,
                               metric_trend, unit_trends)
from qa.judge import judge, load_profile
from qa.measure.base import Measurement

UNITS = {"asf_fwhm": "mm", "bead_height_error": "mm", "sdnr_d1": "1"}

PROFILE = """\
profile: trend-test
description: invented limits for the tests
limits:
  asf_fwhm:
    unit: mm
    acceptance: {warning: 15.5, action: 18.0}
    constancy: {warning: 0.2, action: 0.5, as: fraction}
    source: invented for the tests
  bead_height_error:
    unit: mm
    acceptance: {warning: [-0.5, 0.5], action: [-1.0, 1.0]}
    constancy: {warning: 0.3, action: 0.6, as: amount}
    source: invented for the tests
  sdnr_*:
    unit: "1"
    constancy: {warning: 0.5, action: 1.0, as: amount}
    source: invented for the tests
"""


@pytest.fixture
def profile(tmp_path):
    path = tmp_path / "limits.yaml"
    path.write_text(PROFILE)
    return load_profile(path)


@pytest.fixture
def history(tmp_path):
    with History.open(tmp_path / "history.sqlite") as h:
        yield h


def day(k: int) -> str:
    return (date(2024, 1, 1) + timedelta(days=7 * k)).isoformat()


def record(history, k, values, *, unit_id="FEN-DBT-1", phantom="tern"):
    ms = tuple(MeasurementRecord(name, v, UNITS[name], None if v is None else 0.1,
                                 "not measured" if v is None else "pass",
                                 note="not measured: bead not found" if v is None else "")
               for name, v in values.items())
    return history.record(SessionRecord(unit_id, day(k), "2024-12-01T10:00", phantom,
                                        "trend-test", "0.1", "pass", ms))


def test_hand_worked_series(history, profile):
    xs = [10.0, 12.0, 11.0, 13.0, 9.0, 12.0, 14.0, 17.0, 17.0]
    ids = [record(history, k, {"asf_fwhm": x}) for k, x in enumerate(xs)]
    history.set_baseline("FEN-DBT-1", "tern", session_ids=ids[:5], reason="acceptance")
    t = metric_trend(history, "FEN-DBT-1", "asf_fwhm", profile=profile)
    (per,) = t.periods
    # centre = (10 + 12 + 11 + 13 + 9) / 5 = 11; moving ranges 2, 1, 2, 4, mean 2.25;
    # sigma = 2.25 / 1.128 = 1.994681; 3-sigma limits 11 -+ 5.984043 (Montgomery)
    # tolerances: 1e-12 for sums of a few doubles; 1e-6 to 3e-6 for 7-figure hand values
    assert per.value == pytest.approx(11.0, abs=1e-12)
    assert per.control.centre == pytest.approx(11.0, abs=1e-12)
    assert per.control.sigma == pytest.approx(1.994681, abs=1e-6)  # 7-figure hand arithmetic
    assert per.control.zone(3) == pytest.approx((5.015957, 16.984043), abs=2e-6)
    assert (per.first, per.stop, per.n, per.session_ids) == (0, 9, 5, tuple(ids[:5]))
    # EWMA from z_0 = 11, lambda = 0.2, over the whole period:
    # z1 = 2.0 + 8.8 = 10.8;          z2 = 2.4 + 8.64 = 11.04;       z3 = 2.2 + 8.832 = 11.032
    # z4 = 2.6 + 8.8256 = 11.4256;    z5 = 1.8 + 9.14048 = 10.94048
    # z6 = 2.4 + 8.752384 = 11.152384; z7 = 2.8 + 8.9219072 = 11.7219072
    # z8 = 3.4 + 9.37752576 = 12.77752576; z9 = 3.4 + 10.222020608 = 13.622020608
    assert per.ewma.z == pytest.approx([10.8, 11.04, 11.032, 11.4256, 10.94048, 11.152384,
                                        11.7219072, 12.77752576, 13.622020608], abs=1e-9)
    # (the z values above are exact decimals; 1e-9 covers double rounding)
    # limit half-widths, L sigma = 2.962 * 1.994681 = 5.908245, lambda/(2-lambda) = 1/9:
    # i = 8: 1 - 0.8^16 = 0.9718525, /9 = 0.1079836, sqrt 0.3286086 -> 1.941498
    # i = 9: 1 - 0.8^18 = 0.9819856, /9 = 0.1091095, sqrt 0.3303173 -> 1.951595
    assert per.ewma.upper[7:] == pytest.approx([12.941498, 12.951595], abs=3e-6)
    # constancy (fraction of the baseline 11, lower is better): warning 11 * 1.2 = 13.2,
    # action 11 * 1.5 = 16.5; acceptance warning 15.5, action 18 (the profile above);
    # pytest.approx's default 1e-6 relative only absorbs the rounding of 11 * 1.2
    assert per.constancy == (LimitLine("warning", "constancy", "high", pytest.approx(13.2)),
                             LimitLine("action", "constancy", "high", pytest.approx(16.5)))
    assert t.acceptance == (LimitLine("warning", "acceptance", "high", 15.5),
                            LimitLine("action", "acceptance", "high", 18.0))
    flags = [p.flags for p in t.points]
    # 13 (point 4) < 13.2 and within 3 sigma; 14 > 13.2 -> warning only;
    # 17 > 16.5 (action) and 17 > 16.984043 (just beyond 3 sigma); the second 17 also
    # completes 2 of 3 beyond 2 sigma (14.989362: 17, 17) and z9 = 13.622 > 12.9516,
    # while z8 = 12.778 < 12.9415
    assert flags == [(), (), (), (), (), (), (OUTSIDE_WARNING,), (OUTSIDE_ACTION, BEYOND_3),
                     (OUTSIDE_ACTION, BEYOND_3, TWO_OF_THREE, EWMA_BEYOND)]
    assert [p.verdict for p in t.points][5:] == ["pass", "warning", "fail", "fail"]
    assert [p.in_baseline for p in t.points] == [True] * 5 + [False] * 4
    assert (t.count(OUTSIDE_ACTION), len(t.flagged()), t.latest.session_id) == (2, 3, ids[-1])


def test_lines_agree_with_the_verdicts(profile):
    # Each line drawn must be where judge() changes its verdict: with only that kind of
    # limit, a value just inside a warning line passes and just outside it warns; just
    # inside an action line warns and just outside fails (1e-9 of the value either side).
    for metric, base in (("asf_fwhm", 11.0), ("bead_height_error", 0.2), ("sdnr_d1", 3.0)):
        full = profile.limit_for(metric)
        for kind in ("acceptance", "constancy"):
            limit = replace(full, constancy=None) if kind == "acceptance" else \
                replace(full, acceptance=None)
            lines = limit_lines(limit, baseline=base, kind=kind)
            assert bool(lines) == (getattr(full, kind) is not None), (metric, kind)
            for line in lines:
                step = 1e-9 * max(1.0, abs(line.value)) * (1 if line.side == "high" else -1)
                got = [judge(Measurement(metric, line.value + s * step, "mm"), limit,
                             base).verdict for s in (-1, 1)]
                want = ["pass", "warning"] if line.level == "warning" else ["warning", "fail"]
                assert got == want, (metric, line)
    # band with an amount: 0.2 -+ 0.3 and 0.2 -+ 0.6 (hand arithmetic)
    band = limit_lines(profile.limit_for("bead_height_error"), baseline=0.2, kind="constancy")
    assert sorted(round(x.value, 12) for x in band) == [-0.4, -0.1, 0.5, 0.8]


def test_periods_follow_the_baselines(history, profile):
    ids = [record(history, k, {"asf_fwhm": 10.0 + 0.1 * (k % 3), "sdnr_d1": 3.0})
           for k in range(10)]
    history.set_baseline("FEN-DBT-1", "tern", session_ids=ids[1:4], reason="acceptance",
                         at="2024-04-01T00:00:00+00:00")
    history.set_baseline("FEN-DBT-1", "tern", session_ids=ids[6:8], reason="new detector",
                         at="2024-05-01T00:00:00+00:00")
    t = metric_trend(history, "FEN-DBT-1", "asf_fwhm", profile=profile)
    # session 0 predates every baseline period; 1-5 under the first, 6-9 under the second
    assert [p.period for p in t.points] == [None] + [0] * 5 + [1] * 4
    assert [(p.first, p.stop) for p in t.periods] == [(1, 6), (6, 10)]
    # second baseline: mean of 10.0 (k = 6) and 10.1 (k = 7) = 10.05
    assert t.periods[1].value == pytest.approx(10.05)  # default rel 1e-6: float rounding
    assert t.points[0].flags == () and t.points[0].verdict == "pass"
    # sdnr_d1 never varies: the control limits cannot be estimated, and the trend says why
    s = metric_trend(history, "FEN-DBT-1", "sdnr_d1", profile=profile)
    assert s.periods[0].control is None and "do not vary" in s.periods[0].control_note
    # a baseline set again from the first sessions replaces both for every later point
    history.set_baseline("FEN-DBT-1", "tern", session_ids=ids[0:2], reason="re-set",
                         at="2024-06-01T00:00:00+00:00")
    t = metric_trend(history, "FEN-DBT-1", "asf_fwhm", profile=profile)
    assert [p.period for p in t.points] == [0] * 10 and len(t.periods) == 1
    assert t.periods[0].reason == "re-set"


def test_one_session_baseline_and_not_measured(history, profile):
    a = record(history, 0, {"asf_fwhm": 10.0, "bead_height_error": None})
    record(history, 1, {"asf_fwhm": 10.5, "bead_height_error": 0.1})
    history.set_baseline("FEN-DBT-1", "tern", session_ids=[a], reason="acceptance")
    trends = unit_trends(history, "FEN-DBT-1", profile=profile)
    assert [t.metric for t in trends.metrics] == ["asf_fwhm", "bead_height_error"]
    asf, bead = trends.metrics
    assert asf.periods[0].control is None
    assert "needs at least 2 baseline values" in asf.periods[0].control_note
    # the bead was not measured in the baseline session: no baseline value for it
    assert bead.not_measured == 1 and len(bead.points) == 1
    assert bead.periods[0].value is None and bead.periods[0].constancy == ()
    assert "not measured in the baseline sessions" in bead.periods[0].control_note


def _current(profile, value):
    """A session being analysed, not yet recorded (the fields trends read)."""
    from qa.judge import judge_all
    from qa.locate.layout import Layout
    from qa.phantom.model import Phantom
    from qa.session import SessionResult

    phantom = Phantom("tern", "test", 20.0, ())
    judged = judge_all([Measurement("asf_fwhm", value, "mm", 0.1)], profile)
    return SessionResult("FEN-DBT-1", "2024-12-02", "2024-12-02T10:00:00", phantom,
                         profile, (), judged, "pass", Layout(phantom, {}))


def test_current_session_is_the_last_point(history, profile):
    ids = [record(history, k, {"asf_fwhm": x}) for k, x in enumerate([10.0, 12.0, 11.0])]
    history.set_baseline("FEN-DBT-1", "tern", session_ids=ids, reason="acceptance")
    # centre 11, sigma = mean MR 1.5 / 1.128 = 1.329787; UCL 11 + 3.989362 = 14.989362;
    # the constancy action line is 16.5, so 17.0 is outside it and beyond 3 sigma
    t = metric_trend(history, "FEN-DBT-1", "asf_fwhm", profile=profile,
                     current=_current(profile, 17.0))
    assert len(t.points) == 4 and t.latest.current and t.latest.session_id is None
    assert t.latest.flags[:2] == (OUTSIDE_ACTION, BEYOND_3)
    assert t.periods[0].control.zone(3)[1] == pytest.approx(14.989362, abs=2e-6)  # 7 figures
    record(history, 5, {"asf_fwhm": 1.0}, phantom="other")
    with pytest.raises(InputError, match="the current session is of unit 'FEN-DBT-1', "
                                         "phantom 'tern', not 'FEN-DBT-1', 'other'"):
        metric_trend(history, "FEN-DBT-1", "asf_fwhm", phantom="other",
                     current=_current(profile, 17.0))


def test_slow_drift_is_flagged_before_the_action_limit(history, tmp_path):
    # ASF FWHM of 5.0 mm with a session-to-session SD of 0.05 mm (invented), 20 baseline
    # sessions, then a rise of 0.005 mm (0.1 sigma) per session for 60 sessions.
    profile_path = tmp_path / "drift.yaml"
    profile_path.write_text(textwrap.dedent("""\
        profile: drift
        description: constancy only
        limits:
          asf_fwhm:
            unit: mm
            constancy: {warning: 0.03, action: 0.05, as: fraction}
            source: invented for the test
        """))
    profile = load_profile(profile_path)
    rng = np.random.default_rng(20240301)
    k = np.arange(80)
    xs = 5.0 + 0.005 * np.clip(k - 19, 0, None) + 0.05 * rng.standard_normal(80)
    ids = [record(history, i, {"asf_fwhm": float(x)}) for i, x in enumerate(xs)]
    history.set_baseline("FEN-DBT-1", "tern", session_ids=ids[:20], reason="acceptance")
    t = metric_trend(history, "FEN-DBT-1", "asf_fwhm", profile=profile)
    first = {flag: next((i for i, p in enumerate(t.points) if flag in p.flags), None)
             for flag in (EWMA_BEYOND, OUTSIDE_ACTION)}
    flagged = next(i for i, p in enumerate(t.points) if p.flags)
    # measured with this seed: baseline mean 5.0062 mm, sigma 0.0472 mm; the first flag
    # at point 28 (beyond 3 sigma and the 3 % warning line, drift session 9), the EWMA
    # first beyond its limit at point 29 (drift session 10, true rise 0.05 mm = 1 SD) and
    # the first value outside the 5 % action line (5.2565 mm) at point 52
    assert not any(p.flags for p in t.points[:20]), "no false alarm in the baseline period"
    assert first[EWMA_BEYOND] is not None and first[OUTSIDE_ACTION] is not None, first
    assert 20 <= flagged <= first[EWMA_BEYOND] < first[OUTSIDE_ACTION], (flagged, first)
    # the EWMA warns at least 10 sessions (about 2 1/2 months of weekly checks) earlier
    assert first[OUTSIDE_ACTION] - first[EWMA_BEYOND] >= 10, first
    # the action line is the baseline * (1 + 0.05) (default rel 1e-6: float rounding)
    assert t.periods[0].constancy[1].value == pytest.approx(t.periods[0].value * 1.05)


def test_bad_requests(history, profile, tmp_path):
    record(history, 0, {"asf_fwhm": 10.0})
    record(history, 1, {"asf_fwhm": 10.0}, phantom="other")
    with pytest.raises(InputError, match=r"history\.sqlite: no sessions of unit 'NOPE' in "
                                         r"the history \(units: FEN-DBT-1\)"):
        unit_trends(history, "NOPE")
    with pytest.raises(InputError, match="checked with phantoms other, tern; choose one"):
        unit_trends(history, "FEN-DBT-1")
    with pytest.raises(InputError, match=r"never measured .* \(measured: asf_fwhm\)"):
        unit_trends(history, "FEN-DBT-1", phantom="tern", metrics=["mtf50_x"])
    with pytest.raises(InputError, match="no sessions of unit 'FEN-DBT-1' with phantom 'x'"):
        unit_trends(history, "FEN-DBT-1", phantom="x")
    wrong = SimpleNamespace(name="p", source="p.yaml", limit_for=lambda m: SimpleNamespace(
        unit="lp/mm", key=m))
    with pytest.raises(InputError, match="the profile gives 'asf_fwhm' in 'lp/mm', the "
                                         "history holds 'mm'"):
        unit_trends(history, "FEN-DBT-1", phantom="tern", profile=wrong)
