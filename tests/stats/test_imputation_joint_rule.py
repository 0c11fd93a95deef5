"""One rule for a value missing before an intercurrent event when a value after it is observed.

Provenance: the joint distribution N(m*, Σ*) of Carpenter, Roger & Kenward (2013, J Biopharm
Stat 23:1352–1371, section 3) and the conditional normal distribution (a textbook identity:
E[y_M | y_O] = m_M + Σ_MO Σ_OO⁻¹ (y_O − m_O), Cov = Σ_MM − Σ_MO Σ_OO⁻¹ Σ_OM), written out here
independently of the module.  Both patterns — a gap before the event with every later value
observed, and the same gap with a later value also missing — must follow that one rule.
"""
from __future__ import annotations

import numpy as np
import pytest

from trialcut.stats.imputation import ImputationData, ModelParameters, draw_completed, imputation_steps

VISITS = ("V1", "V2", "V3", "V4")
OWN_MEAN = np.array([-1.0, -3.0, -5.0, -7.0])
REFERENCE_MEAN = np.array([-0.5, -1.0, -1.5, -2.0])
SIGMA_OWN = np.array([[4.0, 2.0, 1.5, 1.0], [2.0, 5.0, 2.5, 1.8], [1.5, 2.5, 6.0, 3.0], [1.0, 1.8, 3.0, 7.0]])
SIGMA_REFERENCE = np.array([[3.0, 1.2, 0.9, 0.6], [1.2, 3.5, 1.5, 1.1], [0.9, 1.5, 4.0, 2.0],
                            [0.6, 1.1, 2.0, 4.5]])
DEVIATION = 2          # the event affects visits V3 and V4


def _joint(assumption: str) -> tuple[np.ndarray, np.ndarray]:
    """m* and Σ* written out from the paper's definitions (J2R and CR here)."""
    d = DEVIATION
    mean = np.concatenate([OWN_MEAN[:d], REFERENCE_MEAN[d:]]) if assumption == "jump_to_reference" \
        else REFERENCE_MEAN.copy()
    r11, r12, r21, r22 = SIGMA_REFERENCE[:d, :d], SIGMA_REFERENCE[:d, d:], SIGMA_REFERENCE[d:, :d], SIGMA_REFERENCE[d:, d:]
    a11 = SIGMA_OWN[:d, :d]
    sigma = np.zeros((4, 4))
    sigma[:d, :d] = a11
    sigma[d:, :d] = r21 @ np.linalg.inv(r11) @ a11
    sigma[:d, d:] = sigma[d:, :d].T
    sigma[d:, d:] = r22 - r21 @ np.linalg.inv(r11) @ (r11 - a11) @ np.linalg.inv(r11) @ r12
    return mean, sigma


def _conditional(mean, sigma, values, missing):
    observed = ~missing
    gain = sigma[np.ix_(missing, observed)] @ np.linalg.inv(sigma[np.ix_(observed, observed)])
    centre = mean[missing] + gain @ (values[observed] - mean[observed])
    spread = sigma[np.ix_(missing, missing)] - gain @ sigma[np.ix_(observed, missing)]
    return centre, spread


def _data(row: np.ndarray, copies: int) -> ImputationData:
    # One reference participant (arm 0) with complete data keeps both arms present.
    outcome = np.vstack([np.tile(row, (copies, 1)), np.zeros((1, 4))])
    n = outcome.shape[0]
    return ImputationData(subjects=tuple(range(n)), visits=VISITS, arms=("Placebo", "Active"),
                          outcome=outcome, arm_index=np.array([1] * copies + [0]),
                          covariates=np.empty((n, 0)), covariate_names=(),
                          deviation=np.array([DEVIATION] * copies + [4]))


PARAMETERS = ModelParameters(coefficients=np.stack([REFERENCE_MEAN[None, :], OWN_MEAN[None, :]]),
                             covariances=np.stack([SIGMA_REFERENCE, SIGMA_OWN]))
GAP_ONLY = np.array([-2.0, np.nan, -4.0, -3.0])            # V2 missing; V3, V4 (after the event) observed
GAP_AND_LATER = np.array([-2.0, np.nan, -4.0, np.nan])     # V2 missing; V3 observed; V4 missing


@pytest.mark.parametrize("assumption", ["jump_to_reference", "copy_reference"])
@pytest.mark.parametrize("row", [GAP_ONLY, GAP_AND_LATER], ids=["later_values_observed", "later_value_missing"])
@pytest.mark.parametrize("seed", range(3))
def test_every_pattern_is_drawn_from_the_joint_conditional(assumption, row, seed):
    copies = 40_000
    data = _data(row, copies)
    completed = draw_completed(data, PARAMETERS, assumption, np.random.default_rng(seed))
    missing = np.isnan(row)
    draws = completed[:copies][:, missing]
    centre, spread = _conditional(*_joint(assumption), np.nan_to_num(row), missing)
    standard_error = np.sqrt(np.diag(spread) / copies)
    assert np.all(np.abs(draws.mean(axis=0) - centre) < 5 * standard_error), f"seed {seed}"
    # Monte Carlo error of a sample covariance: √((σᵢᵢσⱼⱼ + σᵢⱼ²)/n) ≈ 0.02 here; five of them allowed.
    tolerance = 5 * np.sqrt((np.outer(np.diag(spread), np.diag(spread)) + spread**2) / copies)
    assert np.all(np.abs(np.cov(draws, rowvar=False).reshape(spread.shape) - spread) < tolerance), f"seed {seed}"


def test_a_gap_before_the_event_uses_the_values_observed_after_it():
    # The gap's conditional mean given the post-event value differs from the one given
    # pre-event values only, so this would catch a return to the old two-rule behaviour.
    mean, sigma = _joint("jump_to_reference")
    with_later, _ = _conditional(mean, sigma, np.nan_to_num(GAP_ONLY), np.isnan(GAP_ONLY))
    before_only, _ = _conditional(OWN_MEAN[:2], SIGMA_OWN[:2, :2], np.nan_to_num(GAP_ONLY[:2]),
                                  np.isnan(GAP_ONLY[:2]))
    assert abs(with_later[0] - before_only[0]) > 0.2
    steps = imputation_steps(_data(GAP_ONLY, 3), "jump_to_reference")
    affected = [s for s in steps if s.deviation is not None]
    assert len(affected) == 1 and list(affected[0].block.given) == [0, 2, 3]


def test_per_participant_assumptions_follow_each_participant():
    data = _data(GAP_AND_LATER, 2)
    steps = imputation_steps(data, ("mar", "jump_to_reference", "mar"))
    rules = sorted((s.rule.name, tuple(s.block.rows)) for s in steps)
    assert rules == [("jump_to_reference", (1,)), ("mar", (0,))]
