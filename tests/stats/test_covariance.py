"""Covariance structures: facts of the trade about their shapes, parameter counts, positive
definiteness anywhere in parameter space, and analytic derivatives against finite differences.

Sources: the shapes (AR(1) correlation rho^|j-k|, equicorrelation, Toeplitz by lag, exponential
decay in time) are common practice; that an AR(1) process has zero partial autocorrelations beyond
lag 1 and the Durbin-Levinson recursion are textbook (Brockwell & Davis, Time Series: Theory and
Methods, 2nd ed., sections 3.4 and 5.2).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import approx_fprime

from trialcut.stats.covariance import STRUCTURES, make_structure
from trialcut.stats.names import COVARIANCE_STRUCTURES

K = 5
TIMES = np.array([0.0, 2.0, 4.0, 8.0, 12.0])
EXPECTED_COUNTS = {   # common practice: parameters of each structure over k visits
    "unstructured": K * (K + 1) // 2, "toeplitz": K, "heterogeneous_toeplitz": 2 * K - 1, "ar1": 2,
    "heterogeneous_ar1": K + 1, "compound_symmetry": 2, "heterogeneous_compound_symmetry": K + 1,
    "spatial_exponential": 2,
}
SEEDS = range(5)


def test_registry_has_exactly_the_shared_names():
    assert tuple(STRUCTURES) == COVARIANCE_STRUCTURES


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_parameter_counts(name):
    assert make_structure(name, K, TIMES).n_parameters == EXPECTED_COUNTS[name]


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
@pytest.mark.parametrize("seed", SEEDS)
def test_positive_definite_for_any_parameters(name, seed):
    structure = make_structure(name, K, TIMES)
    theta = np.random.default_rng(seed).normal(scale=2.0, size=structure.n_parameters)
    sigma = structure.build(theta)
    assert np.allclose(sigma, sigma.T), f"seed {seed}"
    assert np.linalg.eigvalsh(sigma).min() > 0, f"seed {seed}"


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
@pytest.mark.parametrize("seed", SEEDS)
def test_derivatives_match_finite_differences(name, seed):
    structure = make_structure(name, K, TIMES)
    theta = np.random.default_rng(seed).normal(scale=0.5, size=structure.n_parameters)
    sigma, first, second = structure.derivatives(theta, order=2)
    q = structure.n_parameters
    # approx_fprime of a vector-valued function gives its Jacobian, here (k*k, q).
    numeric = approx_fprime(theta, lambda t: structure.build(t).ravel(), 1e-7)
    np.testing.assert_allclose(first.reshape(q, -1), numeric.T, rtol=1e-5, atol=1e-5,
                               err_msg=f"{name} dSigma/dtheta, seed {seed}")
    numeric2 = approx_fprime(theta, lambda t: structure.derivatives(t)[1].ravel(), 1e-7)
    np.testing.assert_allclose(second.reshape(q, q, -1).transpose(0, 2, 1).reshape(-1, q), numeric2,
                               rtol=1e-5, atol=1e-5, err_msg=f"{name} d2Sigma/dtheta2, seed {seed}")


@pytest.mark.parametrize("name", COVARIANCE_STRUCTURES)
def test_start_values_are_finite_for_a_moment_estimate(name):
    rng = np.random.default_rng(7)
    draws = rng.normal(size=(50, K)) @ rng.normal(size=(K, K))
    theta = make_structure(name, K, TIMES).start(np.cov(draws.T))
    assert np.all(np.isfinite(theta))


def test_unstructured_start_reproduces_the_matrix():
    rng = np.random.default_rng(3)
    matrix = np.cov((rng.normal(size=(40, K)) @ rng.normal(size=(K, K))).T)
    structure = make_structure("unstructured", K)
    np.testing.assert_allclose(structure.build(structure.start(matrix)), matrix, rtol=1e-12)


def test_ar1_correlation_is_rho_to_the_lag():
    structure = make_structure("ar1", K)
    log_sd, gamma = np.log(3.0), np.arctanh(0.7)
    sigma = structure.build([log_sd, gamma])
    lag = np.abs(np.subtract.outer(np.arange(K), np.arange(K)))
    np.testing.assert_allclose(sigma, 9.0 * 0.7 ** lag, rtol=1e-12)


def test_compound_symmetry_has_one_variance_and_one_covariance():
    sigma = make_structure("compound_symmetry", K).build([np.log(2.0), 0.3])
    off = sigma[~np.eye(K, dtype=bool)]
    assert np.allclose(np.diag(sigma), 4.0) and np.allclose(off, off[0])


def test_compound_symmetry_reaches_negative_correlations_down_to_the_bound():
    # An equicorrelation matrix is positive definite iff -1/(k-1) < rho < 1 (common practice).
    sigma = make_structure("compound_symmetry", K).build([0.0, -30.0])
    assert sigma[0, 1] == pytest.approx(-1 / (K - 1), abs=1e-9)


def test_toeplitz_depends_on_the_lag_only():
    sigma = make_structure("toeplitz", K).build(np.random.default_rng(1).normal(size=K))
    for d in range(K):
        assert np.allclose(np.diagonal(sigma, d), np.diagonal(sigma, d)[0])


def test_toeplitz_with_one_partial_autocorrelation_is_ar1():
    # Brockwell & Davis 3.4: an AR(1) process has partial autocorrelation 0 beyond lag 1.
    toeplitz = make_structure("toeplitz", K).build([np.log(2.0), np.arctanh(0.6)] + [0.0] * (K - 2))
    ar1 = make_structure("ar1", K).build([np.log(2.0), np.arctanh(0.6)])
    np.testing.assert_allclose(toeplitz, ar1, rtol=1e-12)


def test_spatial_exponential_on_unit_spacing_is_ar1():
    phi = 2.5
    spatial = make_structure("spatial_exponential", K).build([np.log(1.5), np.log(phi)])
    ar1 = make_structure("ar1", K).build([np.log(1.5), np.arctanh(np.exp(-1 / phi))])
    np.testing.assert_allclose(spatial, ar1, rtol=1e-12)


def test_spatial_exponential_uses_the_planned_times():
    phi = 4.0
    sigma = make_structure("spatial_exponential", K, TIMES).build([0.0, np.log(phi)])
    np.testing.assert_allclose(sigma, np.exp(-np.abs(np.subtract.outer(TIMES, TIMES)) / phi), rtol=1e-12)


@pytest.mark.parametrize("homogeneous, heterogeneous", [
    ("ar1", "heterogeneous_ar1"), ("compound_symmetry", "heterogeneous_compound_symmetry"),
    ("toeplitz", "heterogeneous_toeplitz")])
def test_heterogeneous_with_equal_variances_is_homogeneous(homogeneous, heterogeneous):
    rng = np.random.default_rng(11)
    base = make_structure(homogeneous, K)
    theta = rng.normal(size=base.n_parameters)
    widened = np.concatenate([np.full(K, theta[0]), theta[1:]])
    np.testing.assert_allclose(make_structure(heterogeneous, K).build(widened), base.build(theta), rtol=1e-12)


@pytest.mark.parametrize("name", ["unstructured", "compound_symmetry", "toeplitz"])
def test_linear_entries_parametrise_sigma_one_to_one(name):
    # The Kenward-Roger parametrisation: the Jacobian from theta to these entries is invertible.
    structure = make_structure(name, K)
    theta = np.random.default_rng(2).normal(scale=0.3, size=structure.n_parameters)
    first = structure.derivatives(theta)[1]
    rows, cols = zip(*structure.linear_entries)
    jacobian = first[:, list(rows), list(cols)]
    assert np.linalg.matrix_rank(jacobian) == structure.n_parameters


def test_identifiability_reasons():
    counts = np.full((K, K), 10.0)
    counts[0, K - 1] = counts[K - 1, 0] = 0
    assert "visit 1 and visit 5" in make_structure("unstructured", K).identifiability_problem(counts)
    assert make_structure("ar1", K).identifiability_problem(counts) is None
    only_diagonal = np.diag(np.full(K, 10.0))
    assert "two visits" in make_structure("compound_symmetry", K).identifiability_problem(only_diagonal)
