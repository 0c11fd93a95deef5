"""The table of what visit windowing did to each record (issue 8 item 5), on hand-made records
whose fate is worked out by hand from the windows of the test plan (Week 2: day 15 ± 4,
Week 4: day 29 ± 6; the record closest to the planned day is analysed — common practice for
visit windows, as trialcut.data.windowing states it)."""
from __future__ import annotations

from trialcut.data.prepare import prepare_cut

from .conftest import frame_of, make_plan, participant, raw, record


def _counts(cut) -> dict[tuple[str, str], int]:
    table = cut.visit_assignment()
    return {(row.visit, row.what_happened.split(":")[0].split(" ")[0]): row.records for row in table.itertuples()}


def test_kept_moved_placed_and_not_analysed_records_are_counted():
    frame = frame_of(
        participant("S1", "Placebo", 30, 28, 21),                                      # both kept
        [record("S2", "Active", "Baseline", 1, 30, baseline_flag="Y"),
         record("S2", "Active", "Week 2", 27, 25)],                                    # day 27: moved to Week 4
        participant("S3", "Placebo", 30, 28, None) + [record("S3", "Placebo", "Unscheduled", 16, 27)],
        [record("S4", "Active", "Baseline", 1, 30, baseline_flag="Y"),
         record("S4", "Active", "Unscheduled", 30, 24)],                               # placed at Week 4
        [record("S5", "Placebo", "Baseline", 1, 30, baseline_flag="Y"),
         record("S5", "Placebo", "Week 2", 15, 29), record("S5", "Placebo", "Week 4", 45, 20)],  # day 45: no window
    )
    counts = _counts(prepare_cut(make_plan(), raw(frame)))
    assert counts[("Week 2", "kept")] == 3 and counts[("Week 2", "not")] == 1     # S3's day 16 loses to day 15
    assert counts[("Week 4", "kept")] == 1 and counts[("Week 4", "moved")] == 1 and counts[("Week 4", "placed")] == 1
    assert counts[("Week 2", "moved")] == 0 and counts[("Week 2", "placed")] == 0
    assert counts[("(no visit)", "not")] == 1


def test_without_windowing_every_record_stays_where_the_data_puts_it():
    plan = make_plan(visits={"windowing": False})
    frame = frame_of(participant("S1", "Placebo", 30, 28, 21), participant("S2", "Active", 30, None, 20))
    table = prepare_cut(plan, raw(frame)).visit_assignment()
    assert table["records"].tolist() == [1, 2, 0]
    assert table["what_happened"].iloc[:2].str.contains("no windowing").all()


def test_the_data_own_assignment_with_its_analysis_flag_and_other_labels_left_out():
    # An analysis dataset that already chose: S1 has two Week 2 records, the flagged one is
    # analysed (the other is left out, not an error), and an 'Unscheduled' record is left out
    # by the plan's other_labels: leave_out (CDISC ADaM marks analysed records with ANL01FL = Y).
    plan = make_plan(visits={"windowing": False, "other_labels": "leave_out"},
                     columns={"analysis_flag": "ANL01FL"})
    rows = [dict(r, ANL01FL="Y") for r in participant("S1", "Placebo", 30, 28, 21)]
    rows.append(dict(record("S1", "Placebo", "Week 2", 12, 35), ANL01FL=None))
    rows.append(dict(record("S1", "Placebo", "Unscheduled", 40, 20), ANL01FL="Y"))
    rows += [dict(r, ANL01FL="Y") for r in participant("S2", "Active", 30, 26, 22)]
    cut = prepare_cut(plan, raw(frame_of(rows)))
    data = cut.analysis_data("score", "policy")
    week2 = data.frame[(data.frame["USUBJID"] == "S1") & (data.frame["AVISIT"] == "Week 2")]
    assert week2["AVAL"].tolist() == [28.0]                    # the flagged record, not day 12's 35
    table = cut.visit_assignment().set_index("what_happened")["records"]
    assert table["not analysed: not flagged ANL01FL = Y in the data"] == 1
    assert table["not analysed: the visit label is not in the schedule"] == 1
    assert [c.severity for c in cut.conformance.checks if c.id == "known_visits"] == ["warning"]


def test_other_labels_are_refused_unless_the_plan_leaves_them_out():
    import pytest

    from trialcut.errors import DataError

    plan = make_plan(visits={"windowing": False})
    frame = frame_of(participant("S1", "Placebo", 30, 28, 21) + [record("S1", "Placebo", "Unscheduled", 40, 20)])
    with pytest.raises(DataError) as caught:
        prepare_cut(plan, raw(frame))
    assert "visit labels not in the plan: 'Unscheduled'" in caught.value.render()
