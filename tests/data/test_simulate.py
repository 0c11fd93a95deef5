"""The invented LVT-201 simulator: deterministic, shaped as the demo plan expects, and
carrying the features the demo must show (drop-out with reasons, retrieved data, rescue,
unscheduled visits, an interim cut with administrative missingness).

Statistical checks use tolerances of several standard errors and run for several seeds
(the seed is printed on failure).  Permuted blocks of six within strata keep arm counts
within two of each other per stratum (common practice for stratified block randomisation)."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.data.simulate import ARMS, COLUMNS, REASONS, demo_cuts, simulate_trial
from trialcut.plan.schema import AnalysisPlan

DEMO_PLAN = Path(__file__).resolve().parents[2] / "analysis_plans" / "demo.yaml"
SEEDS = (1, 2, 3)


@pytest.fixture(scope="module")
def cuts():
    # The fatigue score's records; the demo's event counts (CRASH, EXPWK) are checked in
    # tests/data/test_simulate_events.py.
    return {seed: {label: frame[frame["PARAMCD"] == "FBS"][COLUMNS].reset_index(drop=True)
                   for label, frame in demo_cuts(seed).items()} for seed in SEEDS}


def test_deterministic_for_a_seed():
    first, again, other = simulate_trial(5, 40), simulate_trial(5, 40), simulate_trial(6, 40)
    pd.testing.assert_frame_equal(first, again)
    assert not first.equals(other)


def test_columns_and_one_baseline_each(cuts):
    for seed, pair in cuts.items():
        final = pair["final"]
        assert list(final.columns) == COLUMNS
        baseline = final[final["ABLFL"] == "Y"]
        assert baseline["USUBJID"].is_unique and len(baseline) == 300, f"seed {seed}"
        assert set(final["TRT01P"]) == set(ARMS) and set(final["STRAT1R"]) == {"Mild", "Severe"}
        values = final["AVAL"]
        assert values.between(0, 60).all() and (values == values.round()).all()
        assert (baseline["ADY"] <= 1).all() and (baseline["ADY"] >= -3).all()


def test_arms_balanced_within_strata(cuts):
    for seed, pair in cuts.items():
        subjects = pair["final"].drop_duplicates("USUBJID")
        counts = subjects.groupby(["STRAT1R", "TRT01P"]).size().unstack()
        assert (counts.max(axis=1) - counts.min(axis=1) <= 2).all(), f"seed {seed}: {counts}"


def test_baseline_distribution(cuts):
    for seed, pair in cuts.items():
        base = pair["final"].query("ABLFL == 'Y'")["AVAL"]
        # Mean about 38 (strata shift it by +0.4 on average), SD about 8: SE of the mean ~0.5.
        assert abs(base.mean() - 38.4) < 2.0, f"seed {seed}: {base.mean()}"
        assert 6 < base.std() < 10.5, f"seed {seed}"


def test_doses_improve_more_than_placebo_and_outcomes_correlate(cuts):
    for seed, pair in cuts.items():
        final = pair["final"]
        week12 = final[final["AVISIT"] == "Week 12"].groupby("TRT01P")["CHG"].mean()
        # True differences about -3 and -6 (less after drop-out): SE of a difference ~0.8.
        assert week12["Lorvatide 20 mg"] - week12["Placebo"] < -2.5, f"seed {seed}: {week12}"
        assert week12["Lorvatide 10 mg"] - week12["Placebo"] < 0, f"seed {seed}: {week12}"
        assert week12["Placebo"] < 0, f"seed {seed}: placebo improves a little"
        wide = final[final["AVISIT"].isin(["Week 8", "Week 12"])].pivot_table(
            index="USUBJID", columns="AVISIT", values="CHG")
        assert wide.corr().loc["Week 8", "Week 12"] > 0.3, f"seed {seed}"


def test_drop_out_retrieved_data_rescue_and_unscheduled_visits(cuts):
    for seed, pair in cuts.items():
        final = pair["final"]
        subjects = final.drop_duplicates("USUBJID")
        stopped = subjects["DISCDY"].notna().mean()
        assert 0.08 < stopped < 0.30, f"seed {seed}: {stopped}"
        assert set(subjects["DCSREAS"].dropna()) <= set(REASONS) and subjects["DCSREAS"].notna().any()
        after_stop = final[final["ADY"] > final["DISCDY"]]
        assert after_stop["USUBJID"].nunique() > 0, f"seed {seed}: no retrieved data"
        left = subjects.loc[subjects["DCSREAS"].notna(), "USUBJID"]
        assert after_stop["USUBJID"].isin(left).sum() == 0, "those who left have no later records"
        assert subjects["RESCDY"].notna().sum() > 0 and (final["AVISIT"] == "Unscheduled").sum() > 0
        assert (subjects["FASFL"] == "Y").mean() > 0.95 and (subjects["PPROTFL"] == "N").any()


def test_interim_is_an_earlier_view_of_the_same_trial(cuts):
    for seed, pair in cuts.items():
        interim, final = pair["interim"], pair["final"]
        assert interim["USUBJID"].nunique() < final["USUBJID"].nunique(), f"seed {seed}"
        keys = ["USUBJID", "AVISIT", "ADY"]
        fixed = [c for c in COLUMNS if c not in ("DISCDY", "RESCDY", "DCSREAS")]
        merged = interim[fixed].merge(final[fixed], on=keys, how="left", suffixes=("", "_final"), indicator=True)
        assert (merged["_merge"] == "both").all()
        assert np.allclose(merged["AVAL"], merged["AVAL_final"])
        # Administrative missingness: late enrollees have not reached Week 12 at the interim.
        assert (interim["AVISIT"] == "Week 12").sum() < 0.8 * (final["AVISIT"] == "Week 12").sum()


def test_cuts_conform_to_the_demo_plan(cuts):
    plan = AnalysisPlan.model_validate(yaml.safe_load(DEMO_PLAN.read_text(encoding="utf-8")))
    for name, frame in cuts[SEEDS[0]].items():
        cut = prepare_cut(plan, raw_from_frame(frame))
        assert not cut.conformance.errors, name
        data = cut.analysis_data("fbs_change", "primary")
        assert data.frame["outcome_set_missing"].any(), name     # hypothetical after discontinuation
        assert any(e["step"] == "visit_window" and e["visit"] for e in cut.derivations), name


def test_randomisation_dates_stagger_enrolment_and_the_interim_cut_off_bounds_the_data(cuts):
    from trialcut.data.simulate import TREATMENT_REASONS, demo_cut_offs

    cut_offs = demo_cut_offs()
    for seed, pair in cuts.items():
        final, interim = pair["final"], pair["interim"]
        per_participant = final.groupby("USUBJID")["RANDDT"].nunique()
        assert (per_participant == 1).all(), f"seed {seed}: one randomisation date per participant"
        dates = pd.to_datetime(final.drop_duplicates("USUBJID")["RANDDT"])
        assert (dates.max() - dates.min()).days > 180, f"seed {seed}: enrolment is staggered over months"
        # Record date = randomisation date + study day - 1 (CDISC ADaM study-day convention).
        recorded = pd.to_datetime(interim["RANDDT"]) + pd.to_timedelta(interim["ADY"] - 1, unit="D")
        assert recorded.max() <= pd.Timestamp(cut_offs["interim"]), f"seed {seed}"
        assert pd.to_datetime(interim["RANDDT"]).max() <= pd.Timestamp(cut_offs["interim"]), f"seed {seed}"
        assert pd.Timestamp(cut_offs["final"]) >= (pd.to_datetime(final["RANDDT"])
                                                   + pd.to_timedelta(final["ADY"] - 1, unit="D")).max()
        # Why treatment stopped: given exactly for those who stopped (by the cut), from a short list.
        subjects = final.drop_duplicates("USUBJID")
        assert (subjects["DCTREAS"].notna() == subjects["DISCDY"].notna()).all(), f"seed {seed}"
        assert set(subjects["DCTREAS"].dropna()) <= set(TREATMENT_REASONS)
        early = interim.drop_duplicates("USUBJID")
        assert (early["DCTREAS"].notna() == early["DISCDY"].notna()).all(), f"seed {seed}"


def test_the_interim_cut_has_week_12_visits_not_yet_due(cuts):
    import datetime as dt

    from trialcut.data.simulate import demo_cut_offs

    plan = AnalysisPlan.model_validate(yaml.safe_load(DEMO_PLAN.read_text(encoding="utf-8")))
    for seed, pair in cuts.items():
        cut = prepare_cut(plan, raw_from_frame(pair["interim"]), cut_off=demo_cut_offs()["interim"],
                          today=dt.date(2026, 12, 2))
        frame = cut.analysis_data("fbs_change", "primary").frame
        week12 = frame[frame["AVISIT"] == "Week 12"]
        assert (~week12["due"]).sum() > 0.2 * len(week12), f"seed {seed}"
        assert not week12.loc[~week12["due"], "outcome_observed"].any(), f"seed {seed}"
