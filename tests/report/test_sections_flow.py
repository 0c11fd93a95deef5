"""The report's participant-flow section shows the cut-off, says when due-ness could not be
judged, and lays out every flow table of the results with its rows in order (common practice:
a reader must find each count of the flow in the report exactly as computed)."""
from __future__ import annotations

import datetime as dt

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.report.blocks import walk
from trialcut.report.document import build_document
from trialcut.run import runner
from trialcut.run.context import RunContext

from tests.run.test_flow_reconciliation import _random_cut, _random_plan


def _results(with_dates: bool) -> dict:
    plan = _random_plan()
    frame, cut_off = _random_cut(2)
    if not with_dates:
        plan = plan.model_copy(update={"columns": plan.columns.model_copy(update={"randomisation_date": None})})
    cut = prepare_cut(plan, raw_from_frame(frame), cut_off=cut_off, today=dt.date(2026, 12, 2))
    return runner.run_plan(plan, cut, RunContext(root_seed=2), plan_block={}, data_block=cut.summary(),
                           run_block={"id": "r", "cut": "c"})


def _flow_section(results):
    document = build_document(results, draw=False)
    return next(s for s in document.sections if s.anchor == "flow")


def test_every_flow_table_is_shown_with_its_counts():
    results = _results(with_dates=True)
    section = _flow_section(results)
    texts = [b.content for b in section.blocks if b.kind == "paragraph"]
    assert any(results["data"]["cut_off"]["date"] in t for t in texts)
    tables = [b.content for s in walk([section]) for b in s.blocks if b.kind == "table"
              and b.content.title.startswith("Participant flow")]
    flows = results["endpoints"][0]["flow"]
    assert len(tables) == len(flows)
    for shown, entry in zip(tables, flows):
        rows = entry["table"]["data"]
        composite = [r for r in rows if r[1].startswith("composite_")]
        if not any(r[-1] for r in composite):           # composite rows are shown only when used
            rows = [r for r in rows if not r[1].startswith("composite_")]
        assert [row[-1] for row in shown.rows] == [row[-1] for row in rows]
        assert [row[1] for row in shown.rows] == [row[1] for row in rows]
    shown_composite = [t for t in tables if any(r[1].startswith("composite_") for r in t.rows)]
    assert len(shown_composite) == 1                     # only the composite estimand's table


def test_without_dates_the_report_says_due_ness_could_not_be_judged():
    section = _flow_section(_results(with_dates=False))
    notices = [b.content for b in section.blocks if b.kind == "notice"]
    assert any("could not be judged" in n for n in notices)


def test_the_pattern_figure_draws_visits_not_yet_due_apart():
    from trialcut.report.figures import NOT_YET_DUE_COLOUR, pattern_chart

    rows = [{"arm": "A", "pattern": "XX--", "count": 3}, {"arm": "A", "pattern": "X...", "count": 1}]
    drawn = pattern_chart(rows, arms=["A"], visits=["V1", "V2", "V3", "V4"]).decode("utf-8")
    assert NOT_YET_DUE_COLOUR in drawn and "not yet due" in drawn
    plain = pattern_chart(rows[1:], arms=["A"], visits=["V1", "V2", "V3", "V4"]).decode("utf-8")
    assert NOT_YET_DUE_COLOUR not in plain and "not yet due" not in plain


def test_with_several_endpoints_the_flow_headings_name_each_by_its_label_not_its_plan_id():
    # A heading read by a reviewer shows words, never a plan id (common practice: ids are for machines).
    import copy

    results = _results(with_dates=True)
    second = copy.deepcopy(results["endpoints"][0])
    second["id"], second["label"] = "second_score", "Change from baseline in a second score (invented)"
    results["endpoints"].append(second)
    section = _flow_section(results)
    titles = [s.title for s in walk([section])][1:]
    assert any(t.startswith("Change from baseline in a second score: ") for t in titles), titles
    ids = ("second_score", results["endpoints"][0]["id"])
    assert not any(t.startswith(f"{endpoint_id}:") or "second_score" in t for t in titles for endpoint_id in ids), titles
