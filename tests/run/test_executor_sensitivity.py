"""Runner glue of the sensitivity analyses: plan entry + analysis data -> Results entry.

The checks: the entry has the Results shape every comparative analysis shares
(DEVELOPERS.md "Results"), the numbers are those of the statistics layer called directly
with the same seed stream, and the event flag routes values to the assumption.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from tests.stats.test_imputation_support import simulate_trial
from trialcut.data.prepare import AnalysisData
from trialcut.plan.schema import ImputationAnalysis, TippingPointAnalysis
from trialcut.run.context import RunContext
from trialcut.run.sensitivity import run_multiple_imputation, run_tipping_point
from trialcut.stats.imputation import impute

DIFFERENCE_COLUMNS = ["arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper"]
VISITS = ("week2", "week4", "week6")


@pytest.fixture(scope="module")
def data() -> AnalysisData:
    frame = simulate_trial(11, n_per_arm=40, visits=3, dropout=0.3)
    # The data layer's derived columns: the event id from the first affected visit on.
    frame["intercurrent_event"] = np.where(frame["event"], "treatment_discontinuation", None)
    frame["strategy"] = np.where(frame["event"], "treatment_policy", None)
    frame["outcome_set_missing"] = False
    frame = frame.drop(columns="event")
    return AnalysisData(frame=frame, subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="CHG",
                        baseline="BASE", visits=VISITS, visit_days={v: None for v in VISITS},
                        arms=("placebo", "active"), reference="placebo", primary_visit="week6",
                        population="fas", estimand="main")


def test_multiple_imputation_entry(data):
    analysis = ImputationAnalysis(id="mi_j2r", label="J2R", method="multiple_imputation", population="fas",
                                  options={"assumption": "jump_to_reference", "imputations": 6, "burn_in": 5,
                                           "thinning": 2, "covariates": ["BASE"]})
    progress = []
    context = RunContext(root_seed=7, progress=lambda *args: progress.append(args))
    entry = run_multiple_imputation(data, analysis, context)
    assert entry["tables"]["differences"]["columns"] == DIFFERENCE_COLUMNS
    assert len(entry["tables"]["differences"]["data"]) == len(VISITS)
    json.dumps(entry)   # plain JSON, no numpy left
    assert entry["fit"]["imputations"] == 6 and entry["fit"]["diagnostics"]["imputed_after_event"] > 0
    assert progress[-1] == ("mi_j2r", 4, 4)
    # Same seed stream, called directly with the event flag built by hand: same numbers.
    direct = impute(data.frame.assign(flag=data.frame["intercurrent_event"].notna()), subject="USUBJID",
                    arm="TRT01P", visit="AVISIT", outcome="CHG", visits=VISITS, reference="placebo",
                    covariates=("BASE",), assumption="jump_to_reference", event="flag", n_imputations=6,
                    burn_in=5, thinning=2, seed_sequence=context.seed_sequence("mi_j2r"))
    expected = direct.differences()
    got = pd.DataFrame(entry["tables"]["differences"]["data"], columns=DIFFERENCE_COLUMNS)
    assert np.array_equal(got["estimate"].to_numpy(), expected["estimate"].to_numpy())


def test_the_event_column_decides_what_follows_the_assumption(data):
    analysis = dict(id="mi", label="x", method="multiple_imputation", population="fas")
    options = {"imputations": 6, "burn_in": 5, "thinning": 2}
    no_events = AnalysisData(**{**data.__dict__, "frame": data.frame.assign(intercurrent_event=None)})
    context = RunContext(root_seed=7)
    mar = run_multiple_imputation(data, ImputationAnalysis(**analysis, options=options), context)
    j2r_without_events = run_multiple_imputation(
        no_events, ImputationAnalysis(**analysis, options={**options, "assumption": "jump_to_reference"}), context)
    j2r = run_multiple_imputation(
        data, ImputationAnalysis(**analysis, options={**options, "assumption": "jump_to_reference"}), context)
    # Without events every missing value is MAR, whatever the assumption (same seeds).
    assert j2r_without_events["tables"]["differences"]["data"] == mar["tables"]["differences"]["data"]
    assert j2r["tables"]["differences"]["data"] != mar["tables"]["differences"]["data"]


def test_tipping_point_entry(data):
    analysis = TippingPointAnalysis(id="tip", label="Tipping point", method="tipping_point", population="fas",
                                    options={"imputations": 5, "burn_in": 5, "thinning": 2,
                                             "shifts": [0, 1, 2, 3], "reference_shifts": [-1, 0]})
    entry = run_tipping_point(data, analysis, RunContext(root_seed=3))
    grid = entry["tables"]["tipping_grid"]
    assert len(grid["data"]) == 8 and "p" in grid["columns"]
    assert entry["tables"]["differences"]["columns"] == DIFFERENCE_COLUMNS
    assert len(entry["tables"]["tipping_points"]["data"]) == 2
    json.dumps(entry)


def test_repeated_measures_analysis_of_completed_data_through_the_runner(data):
    options = {"imputations": 4, "burn_in": 5, "thinning": 2, "covariates": ["BASE"]}
    context = RunContext(root_seed=5)
    ancova = run_multiple_imputation(data, ImputationAnalysis(
        id="mi", label="x", method="multiple_imputation", population="fas", options=options), context)
    mmrm = run_multiple_imputation(data, ImputationAnalysis(
        id="mi", label="x", method="multiple_imputation", population="fas",
        options={**options, "analysis_model": "mmrm"}), context)
    # Same draws; on completed data the model with per-visit baseline effects gives the
    # per-visit ANCOVA differences (Zellner 1962, see tests/external).
    got = np.array([row[3] for row in mmrm["tables"]["differences"]["data"]])
    want = np.array([row[3] for row in ancova["tables"]["differences"]["data"]])
    assert np.allclose(got, want, rtol=1e-6)
