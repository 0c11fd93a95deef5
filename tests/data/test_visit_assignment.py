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
    assert table["records"].tolist() == [1, 2]
    assert table["what_happened"].str.contains("no windowing").all()
