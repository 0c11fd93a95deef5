"""Reference-based imputation against Carpenter, Roger & Kenward (2013, J Biopharm Stat
23:1352–1371).

Two-visit case by hand: a participant of the active arm leaves after visit 1; with Δ₁ the
arm difference at visit 1 and b = Σ₂₁/Σ₁₁ the regression of visit 2 on visit 1, the
expected imputed difference from the reference at visit 2 is 0 under jump to reference,
b·Δ₁ under copy reference, Δ₁ under copy increments in reference and the arm's own Δ₂ under
MAR (the paper's §3 means, with the conditional normal of the missing visit given the
observed one).  Then, on simulated trials with a positive effect that grows over time and
b < 1, the pooled estimates are ordered J2R ≤ CR ≤ CIR ≤ MAR, as the paper's examples show.
"""
from __future__ import annotations

import numpy as np
import pytest

from tests.stats.test_imputation_support import ROLES, simulate_trial
from trialcut.stats.imputation import ImputationData, ModelParameters, draw_completed, impute

MU_REFERENCE = np.array([1.0, 2.0])
MU_ACTIVE = np.array([3.0, 6.0])          # Δ₁ = 2, Δ₂ = 4
SIGMA = np.array([[4.0, 2.4], [2.4, 4.0]])  # b = 0.6
B = SIGMA[1, 0] / SIGMA[0, 0]
DELTA_1, DELTA_2 = MU_ACTIVE - MU_REFERENCE


def _leavers(n: int, rng) -> ImputationData:
    visit1 = rng.normal(MU_ACTIVE[0], np.sqrt(SIGMA[0, 0]), n)
    outcome = np.column_stack([visit1, np.full(n, np.nan)])
    return ImputationData(tuple(range(n)), ("v1", "v2"), ("reference", "active"), outcome,
                          np.ones(n, dtype=int), np.zeros((n, 0)), (), np.ones(n, dtype=int))


PARAMETERS = ModelParameters(np.stack([MU_REFERENCE, MU_ACTIVE])[:, None, :], np.stack([SIGMA, SIGMA]))

EXPECTED_DIFFERENCE = {
    "jump_to_reference": 0.0,
    "copy_reference": B * DELTA_1,
    "copy_increments_in_reference": DELTA_1,
    "mar": DELTA_2,
}


def _conditional_mean(assumption: str, visit1: np.ndarray) -> np.ndarray:
    """E[y₂ | y₁] from the paper's joint mean m* and the conditional normal."""
    m1, m2 = {
        "jump_to_reference": (MU_ACTIVE[0], MU_REFERENCE[1]),
        "copy_reference": (MU_REFERENCE[0], MU_REFERENCE[1]),
        "copy_increments_in_reference": (MU_ACTIVE[0], MU_ACTIVE[0] + MU_REFERENCE[1] - MU_REFERENCE[0]),
        "mar": (MU_ACTIVE[0], MU_ACTIVE[1]),
    }[assumption]
    return m2 + B * (visit1 - m1)


@pytest.mark.parametrize("assumption", sorted(EXPECTED_DIFFERENCE))
@pytest.mark.parametrize("seed", [0, 1])
def test_two_visit_implied_means(assumption, seed):
    rng = np.random.default_rng(seed)
    data = _leavers(20000, rng)
    completed = draw_completed(data, PARAMETERS, assumption, rng)
    imputed = completed[:, 1]
    monte_carlo = np.sqrt(SIGMA[1, 1] / imputed.size)
    difference = imputed.mean() - MU_REFERENCE[1]
    assert abs(difference - EXPECTED_DIFFERENCE[assumption]) < 4 * monte_carlo, (seed, assumption, difference)
    # Participant by participant: mean E[y₂|y₁] and variance Σ₂₂ − Σ₂₁²/Σ₁₁ of the draws.
    residual = imputed - _conditional_mean(assumption, completed[:, 0])
    conditional_variance = SIGMA[1, 1] - SIGMA[1, 0] ** 2 / SIGMA[0, 0]
    assert abs(residual.mean()) < 4 * np.sqrt(conditional_variance / imputed.size)
    assert residual.var() == pytest.approx(conditional_variance, rel=0.05)
    assert np.array_equal(completed[:, 0], data.outcome[:, 0])    # observed values untouched


@pytest.mark.parametrize("seed", [21, 22, 23])
def test_pooled_estimates_are_ordered(seed):
    # Positive growing effect (the active arm improves by 1 per visit more than the reference),
    # AR(1) correlation 0.6 so that regression coefficients between visits are below 1.
    frame = simulate_trial(seed, n_per_arm=150, visits=4, effect_per_visit=-1.0, dropout=0.4)
    last = {}
    for assumption in ("jump_to_reference", "copy_reference", "copy_increments_in_reference", "mar"):
        result = impute(frame, **ROLES, visits=["week2", "week4", "week6", "week8"], reference="placebo",
                        covariates=("BASE",), event="event", assumption=assumption, n_imputations=20,
                        burn_in=50, thinning=2, seed_sequence=np.random.SeedSequence(seed))
        last[assumption] = result.differences()["estimate"].iloc[-1]
    order = [last["jump_to_reference"], last["copy_reference"], last["copy_increments_in_reference"], last["mar"]]
    assert order == sorted(order), (seed, last)
    assert order[0] > 0, (seed, last)


def test_arm_specific_covariances_use_the_reference_conditional():
    # The paper's Σ* with Σₐ ≠ Σᵣ: visit 2 given visit 1 follows the reference arm's
    # regression b_r = Σᵣ₂₁/Σᵣ₁₁ and residual variance, around the assumption's mean.
    sigma_active = np.array([[9.0, 1.0], [1.0, 9.0]])
    parameters = ModelParameters(PARAMETERS.coefficients, np.stack([SIGMA, sigma_active]))
    rng = np.random.default_rng(5)
    data = _leavers(20000, rng)
    completed = draw_completed(data, parameters, "jump_to_reference", rng)
    residual = completed[:, 1] - (MU_REFERENCE[1] + B * (completed[:, 0] - MU_ACTIVE[0]))
    conditional_variance = SIGMA[1, 1] - SIGMA[1, 0] ** 2 / SIGMA[0, 0]
    assert abs(residual.mean()) < 4 * np.sqrt(conditional_variance / residual.size)
    assert residual.var() == pytest.approx(conditional_variance, rel=0.05)
