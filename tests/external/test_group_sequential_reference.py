"""Group-sequential boundaries checked against published tables and a second route.

Sources:
- Jennison, C. & Turnbull, B.W. (2000), Group Sequential Methods with Applications to
  Clinical Trials, Table 2.1 (Pocock's constants C_P(K, α)) and Table 2.3 (O'Brien & Fleming's
  constants C_B(K, α)) for two-sided tests at α = 0.05 with K equally spaced looks; the same
  constants appear in Pocock (1977, Biometrika 64:191–199) and O'Brien & Fleming (1979,
  Biometrics 35:549–556).  The values below are from memory, to three decimals.
- Lan–DeMets Pocock-type spending, K = 5 equally spaced looks, two-sided α = 0.05: the boundaries
  2.438, 2.427, 2.410, 2.397, 2.386 are quoted in Jennison & Turnbull (2000, ch. 7) and in
  DeMets & Lan (1994, Statistics in Medicine 13:1341–1352); from memory.
- scipy.stats.multivariate_normal (the joint distribution of the standardised statistics with
  Cov(Z_i, Z_j) = √(t_i/t_j), Jennison & Turnbull 2000 §3.1) as a second route to the same
  crossing probabilities.
- A Monte Carlo of the canonical joint distribution (a Brownian motion observed at the looks),
  common practice.
"""
from __future__ import annotations

import numpy as np
import pytest

from trialcut.stats.group_sequential import boundaries, constant_boundaries, continuation_probability

# K: C_P(K, 0.05) and C_B(K, 0.05), two-sided (Jennison & Turnbull 2000, Tables 2.1 and 2.3; from memory)
POCOCK_CONSTANTS = {2: 2.178, 3: 2.289, 4: 2.361, 5: 2.413}
OBRIEN_FLEMING_CONSTANTS = {2: 1.977, 3: 2.004, 4: 2.024, 5: 2.040}


@pytest.mark.parametrize("looks", sorted(POCOCK_CONSTANTS))
def test_pocock_constant_matches_the_published_table(looks):
    bounds = constant_boundaries(looks, alpha=0.05, shape="pocock")
    assert bounds[0] == pytest.approx(POCOCK_CONSTANTS[looks], abs=0.0015)


@pytest.mark.parametrize("looks", sorted(OBRIEN_FLEMING_CONSTANTS))
def test_obrien_fleming_constant_matches_the_published_table(looks):
    bounds = constant_boundaries(looks, alpha=0.05, shape="obrien_fleming")
    # c_k = C_B √(K/k): the last boundary is C_B itself.
    assert bounds[-1] == pytest.approx(OBRIEN_FLEMING_CONSTANTS[looks], abs=0.0015)
    assert bounds[0] == pytest.approx(OBRIEN_FLEMING_CONSTANTS[looks] * np.sqrt(looks), abs=0.004)


def test_lan_demets_pocock_type_five_looks_matches_the_published_values():
    result = boundaries(np.arange(1, 6) / 5, alpha=0.05, spending="pocock_type")
    assert result.z == pytest.approx((2.438, 2.427, 2.410, 2.397, 2.386), abs=0.0015)


@pytest.mark.parametrize("spending,parameter,fractions", [
    ("obrien_fleming_type", None, (0.5, 1.0)),
    ("obrien_fleming_type", None, (0.3, 0.62, 1.0)),
    ("pocock_type", None, (0.25, 0.5, 1.0)),
    ("hwang_shih_decani", -4.0, (0.4, 0.7, 1.0)),
    ("hwang_shih_decani", 1.0, (0.35, 1.0)),
])
def test_integration_and_multivariate_normal_routes_agree(spending, parameter, fractions):
    integrated = boundaries(fractions, alpha=0.05, spending=spending, parameter=parameter)
    by_scipy = boundaries(fractions, alpha=0.05, spending=spending, parameter=parameter,
                          route="multivariate_normal")
    assert integrated.z == pytest.approx(by_scipy.z, abs=2e-4)


def test_boundaries_spend_exactly_the_planned_alpha_by_scipy():
    # P(cross at some look) under the null, from scipy, equals the total alpha spent.
    fractions = (0.33, 0.5, 0.81, 1.0)
    result = boundaries(fractions, alpha=0.05, spending="obrien_fleming_type")
    assert 1 - continuation_probability(fractions, result.z) == pytest.approx(0.05, abs=2e-5)
    partial = 1 - continuation_probability(fractions[:2], result.z[:2])
    assert partial == pytest.approx(result.cumulative_alpha[1], abs=2e-6)


@pytest.mark.parametrize("seed", range(3))
def test_monte_carlo_crossing_rate_matches_alpha(seed):
    # Brownian motion at the looks: Z_k = W(t_k)/√t_k; the share crossing must be α within
    # Monte Carlo error (200 000 paths: standard error ≈ 0.0005).
    fractions = np.array([0.3, 0.6, 1.0])
    result = boundaries(fractions, alpha=0.05, spending="pocock_type")
    rng = np.random.default_rng(seed)
    increments = rng.standard_normal((200_000, 3)) * np.sqrt(np.diff(np.concatenate([[0], fractions])))
    z = np.cumsum(increments, axis=1) / np.sqrt(fractions)
    crossed = (np.abs(z) >= np.array(result.z)).any(axis=1).mean()
    assert crossed == pytest.approx(0.05, abs=0.002), f"seed {seed}"
