"""fit_rate against statsmodels' discrete NegativeBinomial fitted directly on open count data.

Data: (1) total seizures over eight weeks of treatment in the Thall & Vail (1990) trial (HSAUR
`epilepsy`), exposure 8 weeks, log baseline rate and age as covariates; (2) days absent from
school (MASS `quine`, Quine 1975), ethnic background as the two-level "arm", sex and age group
as covariates.  Reference: statsmodels' `NegativeBinomial` (NB2, ML) and, for the Poisson
family, its GLM with the HC0 sandwich.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats

from tests.open_data_discrete import epilepsy_totals, quine
from trialcut import fit_rate


def test_seizure_rate_ratio_matches_statsmodels_negative_binomial():
    data = epilepsy_totals()
    fit = fit_rate(data, outcome="seizures", arm="treatment", reference="placebo", covariates=("log_base", "age"),
                   exposure="weeks")
    reference = smf.negativebinomial("seizures ~ C(treatment, Treatment('placebo')) + log_base + age", data=data,
                                     offset=np.log(data["weeks"])).fit(disp=0)
    name = "C(treatment, Treatment('placebo'))[T.Progabide]"
    row = fit.differences("rate_ratio").iloc[0]
    assert row["estimate"] == pytest.approx(math.exp(reference.params[name]), rel=1e-4)
    assert row["se"] == pytest.approx(reference.bse[name], rel=1e-3)
    z = stats.norm.ppf(0.975)
    assert row["lower"] == pytest.approx(math.exp(reference.params[name] - z * reference.bse[name]), rel=1e-3)
    assert fit.dispersion == pytest.approx(reference.params["alpha"], rel=1e-3)
    assert fit.family == "negative_binomial" and fit.notes == ()


def test_school_absence_rate_ratio_and_rates():
    data = quine()
    fit = fit_rate(data, outcome="Days", arm="Eth", reference="N", covariates=("Sex", "Age"))
    reference = smf.negativebinomial("Days ~ C(Eth, Treatment('N')) + Sex + Age", data=data).fit(disp=0)
    row = fit.differences().iloc[0]
    assert row["estimate"] == pytest.approx(math.exp(reference.params["C(Eth, Treatment('N'))[T.A]"]), rel=1e-4)
    # standardised rate of each arm: statsmodels' predictions averaged with the arm switched
    rates = fit.rates().set_index("arm")["estimate"]
    assert rates["A"] == pytest.approx(reference.predict(data.assign(Eth="A")).mean(), rel=1e-4)
    assert rates["N"] == pytest.approx(reference.predict(data.assign(Eth="N")).mean(), rel=1e-4)


def test_poisson_family_uses_the_robust_covariance():
    data = quine()
    fit = fit_rate(data, outcome="Days", arm="Eth", reference="N", family="poisson")
    reference = smf.glm("Days ~ C(Eth, Treatment('N'))", data=data, family=sm.families.Poisson()).fit(cov_type="HC0")
    row = fit.differences().iloc[0]
    assert row["se"] == pytest.approx(reference.bse["C(Eth, Treatment('N'))[T.A]"], rel=1e-5)
    assert fit.dispersion > 5          # these absences are far more variable than Poisson
