"""Cut-off dates and due visits on hand-made data.

The rule under test (common practice for interim data cuts; CDISC ADaM's study-day convention,
day 1 = the reference date, no day 0): a visit is due when randomisation date + planned day − 1
+ window is on or before the cut-off; a visit with a value is due whatever the calendar says.
Expected dates are worked out by hand in the comments.
"""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.errors import DataError

from .conftest import frame_of, make_plan, participant, raw

TODAY = dt.date(2026, 12, 2)


def _plan():
    return make_plan(columns={"randomisation_date": "RANDDT"})


def _frame():
    # S1 randomised 2026-01-01: Week 2 (day 15, window 4) is due from 2026-01-19
    # (1 Jan + 14 + 4 days); Week 4 (day 29, window 6) from 2026-02-04 (1 Jan + 28 + 6).
    first = frame_of(participant("S1", "Placebo", 30, 28, None)).assign(RANDDT="2026-01-01")
    second = frame_of(participant("S2", "Active", 30, None, None)).assign(RANDDT="2026-01-10")
    return pd.concat([first, second], ignore_index=True)


def _due(data, subject, visit):
    frame = data.frame
    return bool(frame[(frame["USUBJID"] == subject) & (frame["AVISIT"] == visit)]["due"].iloc[0])


def test_a_visit_is_due_when_its_window_has_closed_by_the_cut_off():
    data = prepare_cut(_plan(), raw(_frame()), cut_off=dt.date(2026, 2, 3), today=TODAY).analysis_data("score", "policy")
    assert _due(data, "S1", "Week 2")              # observed, and due since 19 Jan
    assert not _due(data, "S1", "Week 4")          # due only from 4 Feb
    # S2 (10 Jan): Week 2 due from 28 Jan, so due and missing; Week 4 from 13 Feb, not due.
    assert _due(data, "S2", "Week 2") and not _due(data, "S2", "Week 4")
    assert data.due_judged
    assert data.participants_due("Week 4") == 0 and data.participants_due("Week 2") == 2


def test_the_window_edge_is_inclusive():
    cut = prepare_cut(_plan(), raw(_frame()), cut_off=dt.date(2026, 2, 4), today=TODAY)
    assert _due(cut.analysis_data("score", "policy"), "S1", "Week 4")


def test_an_observed_visit_is_due_even_before_its_window_closes():
    frame = _frame()
    cut = prepare_cut(_plan(), raw(frame), cut_off=dt.date(2026, 1, 16), today=TODAY)
    data = cut.analysis_data("score", "policy")
    assert _due(data, "S1", "Week 2")              # seen on day 15 = 15 Jan, window closes 19 Jan
    assert not _due(data, "S2", "Week 2")


def test_not_due_rows_are_left_out_of_what_methods_receive():
    data = prepare_cut(_plan(), raw(_frame()), cut_off=dt.date(2026, 2, 3), today=TODAY).analysis_data("score", "policy")
    kept = data.due_only().frame
    assert len(kept) == 2 and kept["due"].all()
    assert set(zip(kept["USUBJID"], kept["AVISIT"])) == {("S1", "Week 2"), ("S2", "Week 2")}


def test_without_a_given_cut_off_the_latest_date_in_the_data_is_used_with_a_note():
    cut = prepare_cut(_plan(), raw(_frame()), today=TODAY)
    # Latest record: S2's baseline on day 1 = 10 Jan; S1's Week 2 on day 15 = 15 Jan.
    assert cut.cut_off.date == dt.date(2026, 1, 15) and cut.cut_off.source == "latest date in the data"
    assert any("No cut-off was given" in note for note in cut.cut_off.notes)
    assert cut.summary()["cut_off"]["date"] == "2026-01-15"


def test_without_a_date_column_every_visit_is_due_and_the_cut_says_so():
    cut = prepare_cut(make_plan(), raw(_frame().drop(columns="RANDDT")), cut_off=dt.date(2026, 2, 3), today=TODAY)
    data = cut.analysis_data("score", "policy")
    assert data.frame["due"].all() and not data.due_judged
    assert "could not be judged" in cut.cut_off.notes[0]


@pytest.mark.parametrize("cut_off, code", [(dt.date(2025, 12, 31), "data.cut_off_before_data"),
                                           (dt.date(2026, 12, 3), "data.cut_off_in_future")])
def test_a_cut_off_outside_the_data_or_in_the_future_is_refused(cut_off, code):
    with pytest.raises(DataError) as caught:
        prepare_cut(_plan(), raw(_frame()), cut_off=cut_off, today=TODAY)
    assert caught.value.problems[0].code == code and caught.value.problems[0].field == "--cut-off"


def test_unparseable_dates_are_refused_with_their_rows():
    frame = _frame()
    frame.loc[2, "RANDDT"] = "10/01/2026x"
    with pytest.raises(DataError) as caught:
        prepare_cut(_plan(), raw(frame), today=TODAY)
    problem = caught.value.problems[0]
    assert problem.code == "data.unparseable_date" and problem.field == "RANDDT"
    assert problem.rows[0] == "record 3 (S2): '10/01/2026x'"


def test_a_number_is_not_a_date():
    frame = _frame().assign(RANDDT=20260101.0)
    with pytest.raises(DataError, match="not dates"):
        prepare_cut(_plan(), raw(frame), today=TODAY)


def test_the_composite_value_waits_for_a_due_visit():
    frame = _frame().assign(DISCDY=[np.nan, np.nan, 3.0])
    cut = prepare_cut(_plan(), raw(frame), cut_off=dt.date(2026, 2, 3), today=TODAY)
    data = cut.analysis_data("score", "comp")
    rows = data.frame[data.frame["USUBJID"] == "S2"]
    assert rows["outcome_set_composite"].tolist() == [True, False]   # Week 2 due, Week 4 not yet
    assert np.isnan(rows["CHG"].iloc[1])


def test_without_a_planned_day_or_a_participant_date_the_visit_counts_as_due():
    plan = make_plan(columns={"randomisation_date": "RANDDT"},
                     visits={"windowing": False, "schedule": [{"label": "Week 2", "order": 1, "day": 15, "window": 4},
                                                              {"label": "Week 4", "order": 2}]})
    frame = _frame()
    frame.loc[frame["USUBJID"] == "S2", "RANDDT"] = None
    cut = prepare_cut(plan, raw(frame), cut_off=dt.date(2026, 1, 16), today=TODAY)
    data = cut.analysis_data("score", "policy")
    assert _due(data, "S1", "Week 4")                     # no planned day: cannot be judged
    assert _due(data, "S2", "Week 2") and _due(data, "S2", "Week 4")   # no date for S2
    assert any("have no RANDDT" in note for note in cut.cut_off.notes)


def test_date_and_conformance_problems_are_reported_together():
    frame = _frame()
    frame.loc[2, "RANDDT"] = "soon"
    frame.loc[1, "AVAL"] = 75.0                     # outside the endpoint's range 0-60
    with pytest.raises(DataError) as caught:
        prepare_cut(_plan(), raw(frame), today=TODAY)
    codes = {p.code for p in caught.value.problems}
    assert "data.unparseable_date" in codes and "data.value_range" in codes


def test_a_cut_without_its_participant_column_is_a_conformance_error_not_a_fault():
    with pytest.raises(DataError, match="does not conform"):
        prepare_cut(_plan(), raw(_frame().drop(columns="USUBJID")), today=TODAY)
