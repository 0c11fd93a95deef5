"""Imputation: contracts (inputs untouched, same seed same numbers, row order irrelevant),
the building blocks against textbook identities, and refused inputs."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tests.stats.test_imputation_support import ROLES, simulate_trial
from trialcut.errors import ModelSpecificationError
from trialcut.stats.imputation import (
    ASSUMPTIONS, ImputationData, _inverse_wishart, delta_by_arm, impute, lag1_autocorrelation,
    prepare_data, reference_based_covariance, shift_matrix,
)
from trialcut.stats.names import IMPUTATION_ASSUMPTIONS

VISITS = ["week2", "week4", "week6"]
SMALL = dict(n_imputations=4, burn_in=3, thinning=1, chains=2)


def _run(frame, **options):
    settings = {**SMALL, **options}
    return impute(frame, **ROLES, visits=VISITS, reference="placebo", covariates=("BASE",), event="event",
                  seed_sequence=np.random.SeedSequence(5), **settings)


@pytest.fixture(scope="module")
def trial():
    return simulate_trial(2, n_per_arm=30, visits=3, dropout=0.3, intermittent=0.1)


def test_registry_keys_are_the_schema_names():
    assert tuple(ASSUMPTIONS) == IMPUTATION_ASSUMPTIONS


@pytest.mark.parametrize("assumption", IMPUTATION_ASSUMPTIONS)
def test_contract_untouched_input_repeatable_and_order_free(trial, assumption):
    before = trial.copy()
    first = _run(trial, assumption=assumption).to_dict()
    pd.testing.assert_frame_equal(trial, before)
    assert _run(trial, assumption=assumption).to_dict() == first
    shuffled = trial.sample(frac=1.0, random_state=1).reset_index(drop=True)
    assert _run(shuffled, assumption=assumption).to_dict() == first


def test_one_seed_sequence_object_used_twice_gives_the_same_numbers(trial):
    seeds = np.random.SeedSequence(5)
    first = impute(trial, **ROLES, visits=VISITS, reference="placebo", seed_sequence=seeds, **SMALL).to_dict()
    again = impute(trial, **ROLES, visits=VISITS, reference="placebo", seed_sequence=seeds, **SMALL).to_dict()
    assert first == again and seeds.n_children_spawned == 0


def test_result_tables_and_diagnostics(trial):
    result = _run(trial, assumption="copy_reference")
    differences = result.differences()
    assert list(differences.columns) == ["arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper"]
    assert list(differences["visit"]) == VISITS
    assert (differences["lower"] < differences["estimate"]).all() and (differences["estimate"] < differences["upper"]).all()
    pooling = result.pooling()
    assert (pooling["imputations"] == 4).all() and (pooling["complete_df"] == 60 - 3).all()
    diagnostics = result.diagnostics
    assert diagnostics["draws_per_chain"] == [2, 2]
    assert diagnostics["imputed_values"] == int(trial["CHG"].isna().sum())
    assert diagnostics["imputed_after_event"] == int((trial["CHG"].isna() & trial["event"]).sum())
    assert set(diagnostics["lag1_autocorrelation"]) == {"mean placebo at week6", "mean active at week6",
                                                        "log determinant of covariance"}


def test_lag1_autocorrelation_matches_statsmodels_acf():
    # statsmodels.tsa.stattools.acf uses the same estimator (overall mean, sum over lag pairs).
    from statsmodels.tsa.stattools import acf

    rng = np.random.default_rng(0)
    series = np.cumsum(rng.normal(size=200)) * 0.1 + rng.normal(size=200)
    assert lag1_autocorrelation([series]) == pytest.approx(acf(series, nlags=1)[1], rel=1e-12)


def test_inverse_wishart_mean():
    # E[Σ] = S/(ν − T − 1) for Σ ~ IW(ν, S) (Anderson, An Introduction to Multivariate
    # Statistical Analysis, 3rd ed., §7.7); 4000 draws, tolerance 5 Monte Carlo SEs.
    rng = np.random.default_rng(1)
    scale = np.array([[4.0, 1.0, 0.5], [1.0, 3.0, 0.8], [0.5, 0.8, 2.0]])
    nu = 20
    draws = np.stack([_inverse_wishart(nu, scale, rng) for _ in range(4000)])
    expected = scale / (nu - 3 - 1)
    error = draws.std(axis=0) / np.sqrt(len(draws))
    assert np.all(np.abs(draws.mean(axis=0) - expected) < 5 * error)


def test_reference_based_covariance_blocks():
    # Carpenter, Roger & Kenward 2013: own block before d, reference conditional after d.
    rng = np.random.default_rng(3)
    a = rng.normal(size=(4, 4))
    own = a @ a.T + 4 * np.eye(4)
    b = rng.normal(size=(4, 4))
    reference = b @ b.T + 4 * np.eye(4)
    d = 2
    joint = reference_based_covariance(own, reference, d)
    assert np.allclose(joint, joint.T) and np.all(np.linalg.eigvalsh(joint) > 0)
    assert np.allclose(joint[:d, :d], own[:d, :d])

    def conditional(s):
        gain = np.linalg.solve(s[:d, :d], s[:d, d:]).T
        return gain, s[d:, d:] - gain @ s[:d, d:]

    for got, want in zip(conditional(joint), conditional(reference)):
        assert np.allclose(got, want)
    assert np.allclose(reference_based_covariance(own, reference, 0), reference)
    assert np.allclose(reference_based_covariance(own, own, d), own)


def test_shift_matrix_per_visit_and_cumulative():
    outcome = np.array([[1.0, np.nan, np.nan], [np.nan, 2.0, np.nan], [1.0, 2.0, 3.0]])
    data = ImputationData(("a", "b", "c"), ("v1", "v2", "v3"), ("ref", "act"), outcome, np.array([1, 1, 0]),
                          np.zeros((3, 0)), (), np.array([1, 3, 3]))
    delta = delta_by_arm(("ref", "act"), ("v1", "v2", "v3"), [1.0, 2.0, 3.0], ["act"])
    assert np.array_equal(shift_matrix(data, delta), [[0, 2, 3], [1, 0, 3], [0, 0, 0]])
    # Cumulative: the running sum over the participant's imputed visits (common practice).
    assert np.array_equal(shift_matrix(data, delta, cumulative=True), [[0, 2, 5], [1, 0, 4], [0, 0, 0]])


def test_delta_zero_changes_nothing_and_delta_moves_the_arm(trial):
    plain = _run(trial, assumption="mar").differences()
    zero = _run(trial, assumption="mar", delta=0.0, delta_arms=("active",)).differences()
    pd.testing.assert_frame_equal(plain, zero)
    shifted = _run(trial, assumption="mar", delta=[1.0, 1.0, 1.0], delta_arms=("active",)).differences()
    imputed = trial[trial["TRT01P"] == "active"].groupby("AVISIT")["CHG"].apply(lambda v: v.isna().any())
    moved = imputed.reindex(VISITS).to_numpy()
    assert (shifted["estimate"] > plain["estimate"])[moved].all()
    assert (shifted["estimate"] == plain["estimate"])[~moved].all()   # nothing imputed there
    assert moved.sum() >= 2


def test_event_mapping_equals_event_column(trial):
    first = trial[trial["event"]].groupby("USUBJID")["AVISIT"].first().to_dict()
    by_column = _run(trial, assumption="jump_to_reference").to_dict()
    by_mapping = impute(trial, **ROLES, visits=VISITS, reference="placebo", covariates=("BASE",), event=first,
                        assumption="jump_to_reference", seed_sequence=np.random.SeedSequence(5), **SMALL).to_dict()
    assert by_mapping == by_column


def test_covariance_by_arm_runs_and_differs(trial):
    common = _run(trial, assumption="jump_to_reference").differences()
    by_arm = _run(trial, assumption="jump_to_reference", covariance_by_arm=True)
    assert "log determinant of covariance (active)" in by_arm.diagnostics["lag1_autocorrelation"]
    assert not np.allclose(common["estimate"], by_arm.differences()["estimate"])


@pytest.mark.parametrize("change, code", [
    (lambda f: pd.concat([f, f.iloc[:1]]), "stats.duplicate_visit"),
    (lambda f: f.assign(BASE=np.where(f["USUBJID"] == "active-004", np.nan, f["BASE"])), "stats.covariate_missing"),
    (lambda f: f.assign(BASE=np.where(f.index == 4, 0.0, f["BASE"])), "stats.covariate_varies"),
    (lambda f: f.assign(AVISIT=np.where(f.index == 0, "week99", f["AVISIT"])), "stats.unknown_visit"),
    (lambda f: f.assign(CHG=np.where((f["TRT01P"] == "active") & (f["AVISIT"] == "week6"), np.nan, f["CHG"])),
     "stats.no_observed_values"),
])
def test_bad_data_is_refused_with_a_code(trial, change, code):
    with pytest.raises(ModelSpecificationError) as caught:
        _run(change(trial))
    assert code in [p.code for p in caught.value.problems]


def test_bad_settings_are_refused(trial):
    with pytest.raises(ModelSpecificationError) as caught:
        _run(trial, assumption="last_value", n_imputations=1)
    assert {p.code for p in caught.value.problems} == {"stats.assumption", "stats.imputation_setting"}
    with pytest.raises(ModelSpecificationError):
        _run(trial, delta=1.0, delta_arms=("nobody",))
    with pytest.raises(ModelSpecificationError):
        prepare_data(trial, **ROLES, visits=VISITS, reference="nobody")


def test_common_covariate_effect_is_one_slope_for_all_visits(trial):
    from trialcut.stats.imputation import _CommonSlopeSampler

    data = prepare_data(trial, **ROLES, visits=VISITS, reference="placebo", covariates=("BASE",), event="event")
    sampler = _CommonSlopeSampler(data, covariance_by_arm=False)
    y, parameters = sampler.start()
    rng = np.random.default_rng(0)
    for _ in range(3):
        parameters = sampler.step(y, parameters, rng)
    slopes = parameters.coefficients[:, 1, :]
    assert np.all(slopes == slopes[0, 0])          # the same γ at every visit and in every arm
    result = _run(trial, covariate_effects="common")
    assert result.settings["covariate_effects"] == "common"
    with pytest.raises(ModelSpecificationError):
        _run(trial, covariate_effects="by_arm")


def test_batched_conditional_draw_is_the_textbook_conditional_normal():
    # y_M | y_O ~ N(μ_M + Σ_MO Σ_OO⁻¹ (y_O − μ_O), Σ_MM − Σ_MO Σ_OO⁻¹ Σ_OM) (Anderson 2003, §2.5),
    # here for an intermittent pattern (visits 2 and 4 of 4 missing), 40000 draws.
    from trialcut.stats.imputation import _BatchedConditional

    rng = np.random.default_rng(11)
    a = rng.normal(size=(4, 4))
    sigma = a @ a.T + 2 * np.eye(4)
    mean = np.array([1.0, -2.0, 0.5, 3.0])
    observed_values = np.array([0.3, np.nan, 1.7, np.nan])
    n = 40000
    y = np.tile(observed_values, (n, 1))
    sampler = _BatchedConditional(np.isnan(y), np.zeros(n, dtype=int))
    sampler.draw(y, np.tile(mean, (n, 1)), sigma[None], rng)
    o, m = np.array([0, 2]), np.array([1, 3])
    gain = sigma[np.ix_(m, o)] @ np.linalg.inv(sigma[np.ix_(o, o)])
    want_mean = mean[m] + gain @ (observed_values[o] - mean[o])
    want_cov = sigma[np.ix_(m, m)] - gain @ sigma[np.ix_(o, m)]
    assert np.all(y[:, o] == observed_values[o])
    standard_error = np.sqrt(np.diag(want_cov) / n)
    assert np.all(np.abs(y[:, m].mean(axis=0) - want_mean) < 4 * standard_error)
    assert np.allclose(np.cov(y[:, m].T), want_cov, rtol=0.05, atol=0.02)
