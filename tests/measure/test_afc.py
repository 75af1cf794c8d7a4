"""Tests of qa.analysis.afc (M-alternative forced choice).

Reference values. The table of Hacker & Ratcliff, Perception & Psychophysics 26 (1979)
168-170, could not be read from here (no public copy of its values was found), so no
value below is taken from it. In its place the integral is checked against:
- the closed form for M = 2, Pc = Phi(d'/sqrt 2) (Green & Swets 1966);
- an independent formulation: Pc is the orthant probability of the M-1 differences
  (signal - each noise variable), normal with variance 2 and correlation 1/2, computed
  by scipy.stats.multivariate_normal (Genz's algorithm), a reference library;
- a seeded Monte Carlo of the decision rule itself (pick the largest of M variables).
"""

import math

import numpy as np
import pytest
from scipy import stats

from qa.analysis.afc import dprime_mafc, pc_mafc, threshold_dprime
from qa.errors import InputError


@pytest.mark.parametrize("d", [0.0, 0.3, 1.0, 1.8, 3.0])
def test_two_afc_equals_phi_of_d_over_root2(d):
    # Closed form (Green & Swets 1966); integral vs special function: 1e-9.
    assert pc_mafc(d, 2) == pytest.approx(stats.norm.cdf(d / math.sqrt(2)), abs=1e-9)


def orthant_pc(d, m):
    cov = 0.5 * (np.ones((m - 1, m - 1)) + np.eye(m - 1))
    return stats.multivariate_normal(mean=np.zeros(m - 1), cov=cov).cdf(
        np.full(m - 1, d / math.sqrt(2.0)))


@pytest.mark.parametrize("m", [3, 4, 8])
@pytest.mark.parametrize("d", [0.5, 1.0, 2.0])
def test_mafc_matches_the_orthant_probability(m, d):
    # Tolerance 0.002, the brief's; scipy's quasi-Monte Carlo integration is good to about
    # 1e-5 here, so the check is in practice much tighter.
    assert pc_mafc(d, m) == pytest.approx(orthant_pc(d, m), abs=0.002)


def test_mafc_matches_a_simulated_observer():
    rng = np.random.default_rng(2024)
    trials = 200_000
    for m, d in ((4, 1.235), (6, 1.5)):
        x = rng.standard_normal((trials, m))
        x[:, 0] += d
        pc_sim = np.mean(np.argmax(x, axis=1) == 0)
        se = math.sqrt(pc_sim * (1 - pc_sim) / trials)       # binomial SE, ~0.001
        assert abs(pc_mafc(d, m) - pc_sim) < 4 * se            # 4 SE: p < 1e-4


def test_chance_level_at_zero_dprime():
    # Symmetry: with d' = 0 every alternative is equally likely to be largest.
    for m in (2, 3, 4, 10):
        assert pc_mafc(0.0, m) == pytest.approx(1.0 / m, abs=1e-9)


def test_four_afc_62_5_percent_point_is_1_235():
    # Figure stated in the design brief (d' ~ 1.235), checked to 3 decimals.
    assert round(threshold_dprime(m=4, percent_correct=62.5), 3) == 1.235
    assert round(dprime_mafc(0.625, 4), 3) == 1.235
    # The orthant formulation reaches 62.5 % at the same d' (within 2e-4 in Pc).
    assert orthant_pc(threshold_dprime(), 4) == pytest.approx(0.625, abs=2e-4)


def test_inverse_round_trips():
    for m in (2, 3, 4, 16):
        for pc in (0.2, 0.5, 0.9, 0.99):
            if pc <= 1.0 / m:
                continue
            assert pc_mafc(dprime_mafc(pc, m), m) == pytest.approx(pc, abs=1e-9)


def test_vector_input_and_bad_arguments():
    values = pc_mafc(np.array([0.0, 1.0]), 4)
    assert values.shape == (2,) and values[0] < values[1]
    with pytest.raises(InputError, match="integer >= 2"):
        pc_mafc(1.0, 1)
    with pytest.raises(InputError, match="proportion correct must lie"):
        dprime_mafc(1.0, 4)
