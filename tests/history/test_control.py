"""Control rules: individuals chart, Western Electric run rules, EWMA.

Formulas from D. C. Montgomery, Introduction to Statistical Quality Control (Wiley), and
the Western Electric Statistical Quality Control Handbook (1956); see qa.history.control.
"""

from __future__ import annotations

import numpy as np
import pytest

from qa.errors import InputError
from qa.history.control import (BEYOND_3, D2, EIGHT_ONE_SIDE, EWMA_BEYOND, EWMA_L,
                                EWMA_LAMBDA, FOUR_OF_FIVE, RULES, TWO_OF_THREE,
                                ControlLimits, apply_rules, ewma, individuals_limits,
                                moving_ranges, western_electric)


def test_individuals_limits_worked_example():
    baseline = [10.0, 12.0, 11.0, 13.0, 9.0]
    lim = individuals_limits(baseline)
    # centre = (10 + 12 + 11 + 13 + 9) / 5 = 55 / 5 = 11
    assert lim.centre == pytest.approx(11.0, abs=1e-12)
    # moving ranges |12-10| = 2, |11-12| = 1, |13-11| = 2, |9-13| = 4; mean 9 / 4 = 2.25
    assert list(moving_ranges(baseline)) == [2.0, 1.0, 2.0, 4.0]
    # sigma = MR-bar / d2 = 2.25 / 1.128 = 1.994681 (d2 for n = 2, Montgomery's table of
    # control chart factors; 1.128 = 2 / sqrt(pi) to 4 figures, the mean range of 2 normals)
    assert D2 == pytest.approx(2 / np.sqrt(np.pi), abs=5e-4)
    assert lim.sigma == pytest.approx(1.994681, abs=1e-6)  # hand arithmetic to 7 figures
    assert lim.n_baseline == 5
    # limits centre +- 3 sigma = 11 +- 5.984043 -> 5.015957 and 16.984043;
    # zones at 2 sigma 11 +- 3.989362, at 1 sigma 11 +- 1.994681
    for k, (lo, hi) in ((3, (5.015957, 16.984043)), (2, (7.010638, 14.989362)),
                        (1, (9.005319, 12.994681))):
        assert lim.zone(k) == pytest.approx((lo, hi), abs=2e-6)  # rounding of the above


def test_ewma_worked_example():
    lim = individuals_limits([10.0, 12.0, 11.0, 13.0, 9.0])  # centre 11, sigma 1.994681
    chart = ewma([12.0, 14.0, 9.0], centre=lim.centre, sigma=lim.sigma)
    assert (EWMA_LAMBDA, EWMA_L) == (0.2, 2.962)
    # z_i = lambda x_i + (1 - lambda) z_{i-1}, z_0 = centre = 11, lambda = 0.2:
    # z_1 = 0.2 * 12 + 0.8 * 11    = 2.4 + 8.8   = 11.2
    # z_2 = 0.2 * 14 + 0.8 * 11.2  = 2.8 + 8.96  = 11.76
    # z_3 = 0.2 * 9  + 0.8 * 11.76 = 1.8 + 9.408 = 11.208
    assert chart.z == pytest.approx([11.2, 11.76, 11.208], abs=1e-12)
    # half-width L sigma sqrt(lambda / (2 - lambda) [1 - (1 - lambda)^(2i)]),
    # lambda / (2 - lambda) = 0.2 / 1.8 = 0.111111, L sigma = 2.962 * 1.994681 = 5.908245:
    # i = 1: 1 - 0.8^2 = 0.36,     * 0.111111 = 0.04,     sqrt 0.2      -> 1.181649
    # i = 2: 1 - 0.8^4 = 0.5904,   * 0.111111 = 0.0656,   sqrt 0.256125 -> 1.513249
    # i = 3: 1 - 0.8^6 = 0.737856, * 0.111111 = 0.081984, sqrt 0.286329 -> 1.691699
    half = np.array([1.181649, 1.513249, 1.691699])
    assert chart.upper == pytest.approx(11.0 + half, abs=2e-6)  # 7-figure hand arithmetic
    assert chart.lower == pytest.approx(11.0 - half, abs=2e-6)
    assert not chart.beyond.any()  # 11.2 < 12.18, 11.76 < 12.51, 11.208 < 12.69
    # a point that pushes z_1 past 12.181649: x_1 = 17 gives z_1 = 3.4 + 8.8 = 12.2
    assert list(ewma([17.0], centre=11.0, sigma=lim.sigma).beyond) == [True]


def _pattern(values, sign):
    """Ten points on the centre line, the pattern (in sigma, centre 0), then ten more."""
    return np.concatenate([np.zeros(10), sign * np.asarray(values, dtype=float), np.zeros(10)])


# (rule, the pattern in sigma units, index inside the pattern where the rule fires)
_PATTERNS = [
    (BEYOND_3, [3.5], 0),
    (TWO_OF_THREE, [2.5, 0.0, 2.5], 2),
    (FOUR_OF_FIVE, [1.5, 1.5, 0.0, 1.5, 1.5], 4),
    (EIGHT_ONE_SIDE, [0.5] * 8, 7),
]


@pytest.mark.parametrize("sign", [1.0, -1.0], ids=["above", "below"])
@pytest.mark.parametrize("rule, pattern, at", _PATTERNS, ids=[p[0] for p in _PATTERNS])
def test_each_run_rule_fires_alone(rule, pattern, at, sign):
    # centre 0, sigma 1 given (a known sigma), so the pattern values are in sigma units.
    # Each pattern is built to stay inside every other rule: no point beyond 3 sigma but
    # the first; at most 2 points beyond 1 sigma except in the 4-of-5 pattern; runs on
    # one side broken by centre-line points; EWMA z stays below its limit (z peaks at
    # 0.82 for the 2-of-3 pattern against a limit of 0.98 = 2.962 sqrt(0.2/1.8) nearly).
    x = _pattern(pattern, sign)
    flags = apply_rules(x, ControlLimits(centre=0.0, sigma=1.0, n_baseline=20))
    fired = {k: f for k, f in enumerate(flags) if f}
    assert fired == {10 + at: (rule,)}


def test_near_misses_fire_nothing():
    lim = ControlLimits(centre=0.0, sigma=1.0, n_baseline=20)
    near = [
        [3.0],                        # exactly 3 sigma is not beyond
        [2.5, 0.0, -2.5],             # 2 beyond 2 sigma, but on opposite sides
        [2.5, 0.0, 0.0, 2.5],         # 2 beyond 2 sigma, but not within 3 points
        [1.5, 1.5, 0.0, 0.0, 1.5],    # 3 of 5 beyond 1 sigma
        [0.5] * 7 + [0.0] + [0.5],    # 7 on one side, then the centre line
    ]
    for pattern in near:
        assert not any(apply_rules(_pattern(pattern, 1.0), lim)), pattern


def test_rule_names_and_flag_once():
    assert RULES == ("beyond 3 sigma", "2 of 3 beyond 2 sigma", "4 of 5 beyond 1 sigma",
                     "8 on one side", "EWMA beyond limit")
    # a run of 10 points above the centre: "8 on one side" at points 7, 8 and 9 (each
    # one completes a run of 8), never before
    flags = western_electric(np.full(10, 0.5), centre=0.0, sigma=1.0)
    assert list(np.flatnonzero(flags[EIGHT_ONE_SIDE])) == [7, 8, 9]
    # 2 beyond 2 sigma then a point inside: the inside point is not flagged again
    flags = western_electric([0.0, 2.5, 2.5, 0.0], centre=0.0, sigma=1.0)
    assert list(flags[TWO_OF_THREE]) == [False, False, True, False]


def test_ewma_flags_a_slow_drift_before_the_action_limit():
    rng = np.random.default_rng(20240301)
    true_sigma = 0.05  # e.g. lp/mm on an MTF50 of 3.0 lp/mm (invented)
    baseline = 3.0 + true_sigma * rng.standard_normal(20)
    # after the baseline the metric falls by 0.1 sigma per session
    k = np.arange(60)
    monitored = 3.0 - 0.1 * true_sigma * (k + 1) + true_sigma * rng.standard_normal(60)
    lim = individuals_limits(baseline)
    x = np.concatenate([baseline, monitored])
    flags = apply_rules(x, lim)
    ewma_at = next(i for i, f in enumerate(flags) if EWMA_BEYOND in f)
    action = lim.centre - 4 * lim.sigma  # a fixed action limit at centre - 4 sigma
    action_at = int(np.flatnonzero(x < action)[0])
    # measured with this seed: EWMA first beyond its limit at index 34 (session 15 of the
    # drift, true mean 1.5 sigma low), the series first below centre - 4 sigma at index 48
    # (session 29); the Shewhart 3-sigma limit is first crossed at index 36
    assert int(np.flatnonzero(x < lim.zone(3)[0])[0]) > ewma_at
    assert not any(flags[:20]), "no false alarm in the baseline period"
    assert 20 <= ewma_at < action_at, (ewma_at, action_at)
    assert action_at - ewma_at >= 10, (ewma_at, action_at)


def test_ewma_in_control_run_length_matches_the_table():
    # Montgomery's table of EWMA designs (after Lucas & Saccucci, Technometrics 1990) gives
    # an in-control ARL of about 500 for lambda = 0.2, L = 2.962 (from memory). Simulated
    # here: 2000 in-control series, run length = index of the first point beyond + 1.
    rng = np.random.default_rng(7)
    lengths = []
    for _ in range(2000):
        beyond = ewma(rng.standard_normal(4000), centre=0.0, sigma=1.0).beyond
        lengths.append(int(np.argmax(beyond)) + 1 if beyond.any() else 4000)
    arl = float(np.mean(lengths))
    # standard error of the mean ~ 500 / sqrt(2000) = 11; the table's ARL is for limits at
    # their asymptotic width, the exact (narrower early) limits used here give about 1 %
    # fewer; 450..550 is 4.5 standard errors around 500.
    assert 450 < arl < 550, arl


def test_bad_series_and_limits():
    with pytest.raises(InputError, match="at least 2 baseline values"):
        individuals_limits([3.0])
    assert individuals_limits([3.0], sigma=0.1).zone(3) == pytest.approx((2.7, 3.3))
    with pytest.raises(InputError, match="do not vary"):
        individuals_limits([3.0, 3.0, 3.0])
    with pytest.raises(InputError, match="not a finite number"):
        apply_rules([1.0, np.nan], ControlLimits(0.0, 1.0, 5))
    with pytest.raises(InputError, match="sigma must be a positive number"):
        ewma([1.0], centre=0.0, sigma=0.0)
    with pytest.raises(InputError, match="lam must be in"):
        ewma([1.0], centre=0.0, sigma=1.0, lam=1.5)
