"""The visit-window rule on hand-made cases.

Source of the rule: common practice for analysis visit windows (closest to the target day
wins; a tie goes to the later record; records outside every window are not analysed);
stated in trialcut.data.windowing.  The expected choices below are worked out by hand.
"""
from __future__ import annotations

import pandas as pd
import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.data.windowing import Window, assign_visits
from trialcut.errors import DataError

from .conftest import frame_of, participant, raw, record

WINDOWS = (Window("Week 2", 15, 4), Window("Week 4", 29, 6))


def _assign(days, participants=None):
    days = pd.Series(days, dtype=float)
    participants = pd.Series(participants or ["S1"] * len(days))
    return assign_visits(days, participants, WINDOWS)


def test_closest_to_target_wins():
    result = _assign([12, 16, 19])
    assert result.visit.tolist() == ["Week 2"] * 3
    assert result.chosen.tolist() == [False, True, False]      # |16-15| = 1 is the smallest
    (entry,) = result.log
    assert entry["chosen_day"] == 16 and entry["rejected_days"] == [12, 19]
    assert "closest" in entry["reason"]


def test_tie_goes_to_later_record():
    result = _assign([13, 17])                                 # both two days from day 15
    assert result.chosen.tolist() == [False, True]
    assert "later" in result.log[0]["reason"]


def test_tie_goes_to_later_record_whatever_the_row_order():
    result = _assign([17, 13])
    assert result.chosen.tolist() == [True, False]


def test_outside_every_window_is_dropped_and_logged():
    result = _assign([15, 21, 40])                             # 21: between windows; 40: after the last
    assert result.visit.tolist() == ["Week 2", None, None]
    dropped = [e for e in result.log if e["visit"] is None]
    assert [e["rejected_days"] for e in dropped] == [[21.0], [40.0]]
    assert all("outside every visit window" in e["reason"] for e in dropped)


def test_window_edges_are_inside():
    result = _assign([11, 19, 23, 35])
    assert result.visit.tolist() == ["Week 2", "Week 2", "Week 4", "Week 4"]


def test_overlapping_windows_go_to_the_closer_planned_day_and_ties_to_the_later_visit():
    windows = (Window("A", 10, 6), Window("B", 16, 6))
    days = pd.Series([11.0, 13.0, 15.0])
    result = assign_visits(days, pd.Series(["S1", "S2", "S3"]), windows)
    assert result.visit.tolist() == ["A", "B", "B"]            # 13 is 3 days from both: later visit


def test_each_participant_is_windowed_separately():
    result = _assign([14, 16, 14], ["S1", "S1", "S2"])
    assert result.chosen.tolist() == [False, True, True]       # S1: tie 14/16 -> 16; S2 alone


def test_missing_study_day_is_unassigned_with_a_reason():
    result = _assign([float("nan"), 15])
    assert result.visit.tolist() == [None, "Week 2"]
    assert "no study day" in result.log[0]["reason"]


def test_prepare_cut_uses_the_window_choice(plan):
    rows = participant("S1", "Placebo", 30, None, 25)
    rows += [record("S1", "Placebo", "Unscheduled", 13, 27), record("S1", "Placebo", "Week 2", 18, 22)]
    cut = prepare_cut(plan, raw(frame_of(rows)))
    data = cut.analysis_data("score", "policy")
    week2 = data.frame[data.frame["AVISIT"] == "Week 2"].iloc[0]
    assert week2["ADY"] == 13 and week2["AVAL"] == 27          # |13-15| = 2 beats |18-15| = 3
    assert week2["CHG"] == 27 - 30
    logged = [e for e in cut.derivations if e["step"] == "visit_window"]
    assert logged and logged[0]["rejected_days"] == [18.0]
    assert cut.records.loc[cut.records["ADY"] == 13, "visit_collected"].item() == "Unscheduled"


def test_outside_window_is_a_warning_not_an_error(plan):
    rows = participant("S1", "Placebo", 30, 28, 25) + [record("S1", "Placebo", "Unscheduled", 45, 20)]
    cut = prepare_cut(plan, raw(frame_of(rows)))
    (warning,) = [c for c in cut.conformance.checks if c.id == "visit_windows"]
    assert warning.failed and warning.severity == "warning" and warning.count == 1
    assert warning.rows[0]["row"] == 4                         # the fourth record of the frame


def test_same_day_records_are_an_error(plan):
    rows = participant("S1", "Placebo", 30, 28, 25) + [record("S1", "Placebo", "Unscheduled", 15, 26)]
    with pytest.raises(DataError) as caught:
        prepare_cut(plan, raw(frame_of(rows)))
    assert any(p.code == "data.same_day_records" for p in caught.value.problems)
    assert "same study day" in caught.value.render()
