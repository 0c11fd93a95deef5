"""The derived analysis dataset written into each run folder (issue 8 item 6).

Checks: one row per randomised participant × scheduled visit; the value used per estimand is
what the estimand's analyses see (the ICH E9(R1) strategies: hypothetical sets a value aside,
composite replaces it, treatment policy keeps it); flags add up with the participant flow; and
the CDISC Dataset-JSON v1.1 file reads back (through our reader) with the same values and a
label on every variable (Dataset-JSON's column attributes ``name``, ``label``, ``dataType``).
"""
from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd

from trialcut.data.analysis_dataset import build_analysis_dataset
from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import read_cut
from trialcut.record.analysis_data import write_analysis_data

from .conftest import frame_of, make_plan, participant, raw


def _cut():
    frame = pd.concat([
        frame_of(participant("S1", "Placebo", 30, 28, 21)).assign(RANDDT="2026-01-01"),
        frame_of(participant("S2", "Active", 40, 35, 33, resc=20)).assign(RANDDT="2026-01-01"),
        frame_of(participant("S3", "Active", 40, 37, None, disc=10, fas="N")).assign(RANDDT="2026-01-20"),
    ], ignore_index=True)
    plan = make_plan(columns={"randomisation_date": "RANDDT"})
    return prepare_cut(plan, raw(frame), cut_off=dt.date(2026, 2, 10), today=dt.date(2026, 12, 2))


def test_rows_flags_and_values_per_estimand():
    dataset = build_analysis_dataset(_cut(), "score", frozenset({"hypo"}))
    frame = dataset.frame.set_index(["USUBJID", "AVISIT"])
    assert len(frame) == 3 * 2 and set(dataset.labels) == set(dataset.frame.columns)
    # S3 (randomised 20 Jan): Week 4 is due from 20 Jan + 28 + 6 = 23 Feb, after the cut-off.
    assert not frame.loc[("S3", "Week 4"), "DUE"] and frame.loc[("S3", "Week 2"), "DUE"]
    assert frame.loc[("S3", "Week 2"), "IN_FAS"] == False  # noqa: E712  (not in the full analysis set)
    # S2 took rescue on day 20: Week 4 (day 29) follows it.  Hypothetical for rescue sets it aside.
    assert frame.loc[("S2", "Week 4"), "EV_RESCUE"] and not frame.loc[("S2", "Week 2"), "EV_RESCUE"]
    assert frame.loc[("S2", "Week 4"), "HYPO_SET_ASIDE"] and np.isnan(frame.loc[("S2", "Week 4"), "HYPO_VALUE"])
    assert frame.loc[("S2", "Week 4"), "HYPO_IMPUTED"] and not frame.loc[("S2", "Week 4"), "POLICY_IMPUTED"]
    assert frame.loc[("S2", "Week 4"), "POLICY_VALUE"] == 33 - 40           # treatment policy keeps it
    # Composite: the stop on day 10 replaces S3's Week 2 value by the plan's 10 (S3 is outside
    # the composite estimand's population, so the column is empty there).
    assert np.isnan(frame.loc[("S3", "Week 2"), "COMP_VALUE"])
    assert frame.loc[("S1", "Week 4"), "COMP_VALUE"] == 21 - 30 and not frame.loc[("S1", "Week 4"), "COMP_COMPOSITE"]


def test_value_used_matches_what_the_analyses_receive():
    cut = _cut()
    dataset = build_analysis_dataset(cut, "score", frozenset())
    data = cut.analysis_data("score", "hypo").due_only()
    used = dataset.frame[dataset.frame["HYPO_VALUE"].notna()]
    fitted = data.frame[data.frame[data.outcome].notna()]
    assert sorted(zip(used["USUBJID"], used["AVISIT"], used["HYPO_VALUE"])) == sorted(
        zip(fitted["USUBJID"], fitted["AVISIT"], fitted[data.outcome]))


def test_dataset_json_reads_back_with_labels(tmp_path):
    dataset = build_analysis_dataset(_cut(), "score", frozenset({"hypo"}))
    paths = write_analysis_data(tmp_path, [dataset], study_id="TEST-1", created="2026-12-02T00:00:00Z")
    names = sorted(p.name for p in paths)
    assert names == ["derivations.txt", "score.json", "score.parquet"]
    document = json.loads((tmp_path / "analysis_data" / "score.json").read_text(encoding="utf-8"))
    assert [c["name"] for c in document["columns"]] == list(dataset.frame.columns)
    assert all(c["label"] and c["label"] != c["name"] for c in document["columns"])
    assert document["datasetJSONVersion"] == "1.1.0" and document["records"] == len(dataset.frame)
    back = read_cut(tmp_path / "analysis_data" / "score.json").frame
    pd.testing.assert_series_equal(back["HYPO_VALUE"].astype(float), dataset.frame["HYPO_VALUE"], check_names=False)
    parquet = pd.read_parquet(tmp_path / "analysis_data" / "score.parquet")
    assert list(parquet.columns) == list(dataset.frame.columns) and len(parquet) == len(dataset.frame)
    rules = (tmp_path / "analysis_data" / "derivations.txt").read_text(encoding="utf-8")
    assert "Due:" in rules and "HYPO_IMPUTED" in rules
