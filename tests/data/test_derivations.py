"""Derivations on hand-made data: change from baseline, estimand strategies, populations,
dummy arms.  Sources: CHG = AVAL − BASE is the CDISC ADaM BDS definition of change from
baseline; the hypothetical, treatment-policy and composite strategies are those of ICH
E9(R1) (values after the event are treated as if unobserved / used as observed / replaced by
a prespecified outcome); the expected values are worked out by hand."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.errors import PlanError

from .conftest import frame_of, make_plan, participant, raw


def _cut(frame, plan=None, **kwargs):
    return prepare_cut(plan or make_plan(), raw(frame), **kwargs)


def _row(data, subject, visit):
    frame = data.frame
    return frame[(frame["USUBJID"] == subject) & (frame["AVISIT"] == visit)].iloc[0]


# --------------------------------------------------------------------------- change from baseline
def test_change_is_derived_when_the_column_is_absent():
    cut = _cut(frame_of(participant("S1", "Placebo", 30, 28, 21)))
    data = cut.analysis_data("score", "policy")
    assert data.frame["CHG"].tolist() == [-2.0, -9.0]
    assert data.frame["BASE"].tolist() == [30.0, 30.0]
    assert any(e["step"] == "change_from_baseline" and e["count"] == 2 for e in cut.derivations)


def test_given_change_is_kept_and_empty_change_is_filled():
    # The export's change agrees with 28 − 30 up to its rounding (within the conformance
    # check's tolerance), so it is kept as written; the empty one is derived as 21 − 30.
    frame = frame_of(participant("S1", "Placebo", 30, 28, 21)).assign(BASE=30.0, CHG=[np.nan, -2.00001, np.nan])
    data = _cut(frame).analysis_data("score", "policy")
    assert data.frame["CHG"].tolist() == [-2.00001, -9.0]


def test_given_baseline_column_is_used():
    frame = frame_of(participant("S1", "Placebo", 30, 28, 21)).assign(BASE=31.0)
    data = _cut(frame).analysis_data("score", "policy")
    assert data.frame["CHG"].tolist() == [-3.0, -10.0]


def test_every_scheduled_visit_is_present_and_missing_is_nan():
    data = _cut(frame_of(participant("S1", "Placebo", 30, None, 21))).analysis_data("score", "policy")
    assert data.frame["AVISIT"].tolist() == ["Week 2", "Week 4"]
    assert np.isnan(_row(data, "S1", "Week 2")["CHG"]) and _row(data, "S1", "Week 2")["STRAT1R"] == "Mild"
    assert data.frame["AVISITN"].tolist() == [1.0, 2.0]
    assert data.visits == ("Week 2", "Week 4") and data.visit_days == {"Week 2": 15, "Week 4": 29}
    assert (data.subject, data.arm, data.visit, data.outcome, data.baseline) == (
        "USUBJID", "TRT01P", "AVISIT", "CHG", "BASE")
    assert data.reference == "Placebo" and data.primary_visit == "Week 4"


def test_analysed_value_uses_the_value_column():
    plan = make_plan()
    endpoint = plan.model_dump()["endpoints"][0] | {"analysed": "value"}
    data = _cut(frame_of(participant("S1", "Placebo", 30, 28, 21)), make_plan(endpoints=[endpoint]))
    assert data.analysis_data("score", "policy").outcome == "AVAL"


# --------------------------------------------------------------------------- estimand strategies
def _event_frame():
    # S1: rescue on day 20 (between Week 2 on day 15 and Week 4 on day 29).
    # S2: treatment stopped on day 15, the day of its Week 2 visit, still measured after (retrieved data).
    # S3: no event.
    return frame_of(participant("S1", "Active", 40, 35, 30, resc=20),
                    participant("S2", "Active", 40, 36, 38, disc=15),
                    participant("S3", "Placebo", 40, 39, 37))


def test_treatment_policy_keeps_every_value():
    data = _cut(_event_frame()).analysis_data("score", "policy")
    assert data.frame["CHG"].notna().all()
    assert _row(data, "S1", "Week 4")["intercurrent_event"] == "rescue"
    assert _row(data, "S1", "Week 4")["strategy"] == "treatment_policy"
    assert pd.isna(_row(data, "S1", "Week 2")["intercurrent_event"])
    assert not data.frame["outcome_set_missing"].any()


def test_hypothetical_sets_values_after_the_event_missing():
    data = _cut(_event_frame()).analysis_data("score", "hypo")
    week4 = _row(data, "S1", "Week 4")
    assert np.isnan(week4["CHG"]) and week4["outcome_set_missing"] and week4["strategy"] == "hypothetical"
    assert _row(data, "S1", "Week 2")["CHG"] == -5.0
    # S2's stop is handled by treatment policy in this estimand: values kept.
    assert _row(data, "S2", "Week 4")["CHG"] == -2.0
    assert data.frame["outcome_set_missing"].sum() == 1


def test_event_on_the_visit_day_affects_that_visit():
    # Contract in DEVELOPERS.md: the event counts for a visit when it is on or before the visit.
    data = _cut(_event_frame()).analysis_data("score", "comp")
    assert _row(data, "S2", "Week 2")["intercurrent_event"] == "stop"


def test_composite_sets_the_analysed_variable_to_the_plan_value():
    data = _cut(_event_frame()).analysis_data("score", "comp")
    assert _row(data, "S2", "Week 2")["CHG"] == 10.0 and _row(data, "S2", "Week 4")["CHG"] == 10.0
    assert _row(data, "S2", "Week 4")["outcome_set_composite"]
    assert _row(data, "S3", "Week 4")["CHG"] == -3.0


def test_the_outcome_changing_event_governs_when_a_kept_event_came_first():
    plan = make_plan()
    frame = frame_of(participant("S1", "Active", 40, 35, 30, disc=10, resc=20))
    data = _cut(frame, plan).analysis_data("score", "hypo")
    # stop (treatment policy, day 10) came first, rescue (hypothetical, day 20) still removes Week 4.
    assert _row(data, "S1", "Week 2")["intercurrent_event"] == "stop"
    assert _row(data, "S1", "Week 4")["intercurrent_event"] == "rescue"
    assert np.isnan(_row(data, "S1", "Week 4")["CHG"])


def test_missing_visit_uses_the_planned_day_for_events():
    frame = frame_of(participant("S1", "Active", 40, 35, None, resc=20))
    data = _cut(frame).analysis_data("score", "hypo")
    assert _row(data, "S1", "Week 4")["intercurrent_event"] == "rescue"     # planned day 29 > 20
    assert not _row(data, "S1", "Week 4")["outcome_set_missing"]           # nothing was there to remove


# --------------------------------------------------------------------------- populations
def test_population_filter_uses_the_flag():
    frame = frame_of(participant("S1", "Active", 40, 35, 30, pp="N"), participant("S2", "Placebo", 40, 39, 37),
                     participant("S3", "Placebo", 41, 39, 37, fas="N", pp="N"))
    cut = _cut(frame)
    assert set(cut.analysis_data("score", "policy").frame["USUBJID"]) == {"S1", "S2"}
    per_protocol = cut.analysis_data("score", "policy", population_id="pp")
    assert set(per_protocol.frame["USUBJID"]) == {"S2"} and per_protocol.population == "pp"
    assert set(cut.analysis_data("score").frame["USUBJID"]) == {"S1", "S2", "S3"}
    counts = cut.population_counts().set_index("population")
    assert counts.loc["Full analysis set", "Total"] == 2 and counts.loc["Per protocol set", "Placebo"] == 1


def test_unknown_ids_are_plan_errors():
    cut = _cut(_event_frame())
    with pytest.raises(PlanError, match="unknown estimand"):
        cut.analysis_data("score", "nope")
    with pytest.raises(PlanError, match="unknown endpoint"):
        cut.analysis_data("weight")


def test_disposition_counts():
    frame = frame_of(participant("S1", "Active", 40, 35, None, disc=20, reason="Adverse event"),
                     participant("S2", "Active", 40, 36, 38, disc=22),
                     participant("S3", "Placebo", 40, 39, 37))
    table = _cut(frame).disposition().set_index("measure")
    assert table.loc["Randomised"].tolist() == [1, 2, 3]
    # Counted in the primary analysis' population (the full analysis set), as the flow counts it.
    assert table.loc["Observed at Week 4 (Score change, Full analysis set)"].tolist() == [1, 1, 2]
    assert table.loc["Event: Treatment stopped"].tolist() == [0, 2, 2]
    assert table.loc["Left the study early"].tolist() == [0, 1, 1]
    assert table.loc["  Reason: Adverse event"].tolist() == [0, 1, 1]


# --------------------------------------------------------------------------- dummy arms
def _many(n=60):
    groups = []
    for i in range(n):
        arm = ("Placebo", "Active")[i % 2]
        stratum = "Severe" if i % 3 == 0 else "Mild"
        groups.append(participant(f"S{i:03d}", arm, 40, 35 + i % 5, 30, stratum=stratum))
    return frame_of(*groups)


@pytest.mark.parametrize("seed", range(5))
def test_dummy_arms_are_balanced_within_strata_and_never_read_the_real_arms(seed):
    # Permuted blocks of four (two per arm) within each stratum: arm counts of a stratum differ
    # by at most two (common practice for stratified block randomisation).
    frame = _many()
    dummy = _cut(frame, dummy_arms_seed=seed)
    counts = dummy.subjects.groupby(["STRAT1R", "TRT01P"]).size().unstack(fill_value=0)
    assert list(counts.columns) == ["Arm A", "Arm B"], f"seed {seed}"
    assert ((counts.max(axis=1) - counts.min(axis=1)) <= 2).all(), f"seed {seed}: {counts}"
    # The same allocation whatever the real arms were, or with no treatment column at all.
    blinded = _cut(frame.drop(columns="TRT01P"), dummy_arms_seed=seed)
    relabelled = _cut(frame.assign(TRT01P="Placebo"), dummy_arms_seed=seed)
    assert blinded.subjects["TRT01P"].tolist() == dummy.subjects["TRT01P"].tolist()
    assert relabelled.subjects["TRT01P"].tolist() == dummy.subjects["TRT01P"].tolist()
    # Records follow the participant's dummy arm; the plan names the dummy arms only.
    merged = dummy.records.merge(dummy.subjects[["USUBJID", "TRT01P"]], on="USUBJID", suffixes=("", "_s"))
    assert (merged["TRT01P"] == merged["TRT01P_s"]).all()
    assert dummy.plan.arm_codes == ("Arm A", "Arm B") and dummy.plan.arms.reference == "Arm A"
    assert dummy.dummy_arms_seed == seed
    assert any(e["step"] == "dummy_arms" and e["seed"] == seed for e in dummy.derivations)
    assert "Active" not in str(dummy.plan.model_dump()) and "Placebo" not in str(dummy.plan.model_dump())


def test_dummy_arms_are_deterministic_and_independent_of_row_order():
    frame = _many()
    first = _cut(frame, dummy_arms_seed=11).subjects
    shuffled = _cut(frame.sample(frac=1, random_state=3), dummy_arms_seed=11).subjects
    other = _cut(frame, dummy_arms_seed=12).subjects
    assert first["TRT01P"].tolist() == shuffled["TRT01P"].tolist()
    assert first["TRT01P"].tolist() != other["TRT01P"].tolist()


def test_dummy_arms_are_a_no_op_without_a_seed():
    cut = _cut(_many(6))
    assert cut.dummy_arms_seed is None and not any(e["step"] == "dummy_arms" for e in cut.derivations)
