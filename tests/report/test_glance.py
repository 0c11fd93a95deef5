"""Primary results at a glance (reviewer finding): the primary estimates near the front of the report.

Every number of the glance table must print exactly as the same number in the primary analysis'
own table of differences in the same document, and N per arm as in the run's population table.
The checks compare rendered cell texts (ReportTable.body, which the HTML, PDF and DOCX use), read
each table independently of the code that builds the glance rows. Checked on the invented
rendering fixture and on the invented demo plan run on a small demo cut (a continuous, a binary
and a count endpoint, decimals 1, 3 and 0; a rate ratio and an odds ratio).
"""
from __future__ import annotations

import copy
import datetime as dt
import re
from pathlib import Path

import pytest
import yaml

from trialcut.report.blocks import walk
from trialcut.report.document import build_document
from trialcut.report.tables import rows_as_dicts

ROOT = Path(__file__).resolve().parents[2]
GLANCE_TITLE = "Primary results at a glance"


def _glance(document):
    section = next(s for s in document.sections if s.title == GLANCE_TITLE)
    return next(b.content for b in section.blocks if b.kind == "table")


def _cells(table) -> list[dict[str, str]]:
    labels = [c.label for c in table.header()]
    return [dict(zip(labels, [text for text, _ in row])) for row in table.body()]


ARMS_CELL = re.compile(r"(.+) \(N = (\d+)\) against (.+) \(N = (\d+)\)")


def _by_number(document, number: str):
    return next(t for t in document.tables if t.number == number)


def _check_against_own_tables(document, results) -> int:
    """Each glance row against the differences table its "Full table" cell names; returns the rows checked."""
    glance = _glance(document)
    interval = next(c.label for c in glance.header() if c.label.endswith("onfidence interval"))
    population_rows = {row["population"]: row for row in rows_as_dicts(results["populations"])}
    checked = 0
    for row, source in zip(_cells(glance), glance.rows):
        own = _by_number(document, row["Full table"])
        assert "differences" in own.slug or "Differences" in own.title, (row["Full table"], own.title)
        arm, n_arm, reference, n_reference = ARMS_CELL.fullmatch(row["Arm (N) against reference (N)"]).groups()
        matches = [cells for cells in _cells(own)
                   if cells.get("Arm") == arm and cells.get("Visit", "whole period") == row["Visit"]]
        assert len(matches) == 1, (row, own.title)
        mine = matches[0]
        assert row["Estimate"] == mine["Estimate"]
        assert row[interval] == mine[interval]
        assert row["p-value"] == mine["p-value"]
        if "Effect measure" in mine:      # a binary or count analysis names its measure in its own table
            assert row["Effect measure"].startswith(mine["Effect measure"])
        # N per arm as the population table has it.
        counts = population_rows[source[glance.columns.index("population")]]
        assert (int(n_arm), int(n_reference)) == (counts[arm], counts[reference]), row
        checked += 1
    return checked


# --------------------------------------------------------------------------- the rendering fixture
@pytest.fixture(scope="module")
def results(report_fixtures):
    return report_fixtures.build_results()


def test_glance_numbers_print_as_the_primary_table_on_the_fixture(results):
    document = build_document(results, draw=False)
    assert _check_against_own_tables(document, results) == 2     # two active arms, one endpoint


def test_glance_comes_right_after_the_run_record_and_before_the_participant_flow(results):
    titles = [s.title for s in build_document(results, draw=False).sections]
    at = titles.index(GLANCE_TITLE)
    assert titles[at - 1] == "About this run"
    flow = next(i for i, s in enumerate(build_document(results, draw=False).sections) if "flow" in s.anchor)
    assert at < flow
    assert titles.count(GLANCE_TITLE) == 1


def test_glance_table_title_is_unique_and_stands_alone(results):
    document = build_document(results, draw=False)
    glance = _glance(document)
    titles = [t.title for t in [*document.tables, *document.csv_tables]]
    assert titles.count(glance.title) == 1
    assert "full analysis set" in glance.title
    assert glance.counts.startswith("Full analysis set:") and "Placebo N = 60" in glance.counts
    assert "Confidence level: 95% in every primary analysis." in glance.footnotes
    assert any(line.startswith("Source: primary analyses fbs_change/primary_mmrm") for line in glance.footnotes)


def test_a_failed_primary_shows_its_reason(results):
    failed = copy.deepcopy(results)
    primary = failed["endpoints"][0]["analyses"][0]
    primary.update(status="failed", tables={}, error="FitError: every covariance structure tried failed")
    rows = _cells(_glance(build_document(failed, draw=False)))
    assert len(rows) == 2
    for row in rows:
        assert row["Estimate"] == "failed: FitError: every covariance structure tried failed"
        assert row["p-value"] == "not estimated"
        assert all(text.strip() for text in row.values())      # never a blank cell
        assert row["Full table"].startswith("Section Primary analysis")
        assert row["Primary analysis; estimand, population"].startswith("Repeated-measures model, treatment policy")


def test_a_primary_without_the_primary_visit_says_so(results):
    partial = copy.deepcopy(results)
    differences = partial["endpoints"][0]["analyses"][0]["tables"]["differences"]
    at = differences["columns"].index("visit")
    differences["data"] = [row for row in differences["data"] if row[at] != "Week 12"]
    rows = _cells(_glance(build_document(partial, draw=False)))
    assert [row["Estimate"] for row in rows] == ["no estimate at Week 12 in its table"] * 2


def test_an_estimate_over_the_whole_period_is_shown_as_such(results):
    whole = copy.deepcopy(results)
    differences = whole["endpoints"][0]["analyses"][0]["tables"]["differences"]
    at = differences["columns"].index("visit")
    differences["columns"].pop(at)
    differences["data"] = [row[:at] + row[at + 1:] for row in differences["data"] if row[at] == "Week 12"]
    document = build_document(whole, draw=False)
    assert [row["Visit"] for row in _cells(_glance(document))] == ["whole period"] * 2
    assert _check_against_own_tables(document, whole) == 2


def test_the_full_table_column_names_the_numbered_table(results):
    document = build_document(results, draw=False)
    row = _cells(_glance(document))[0]
    own = next(t for s in walk(document.sections) if s.anchor == "endpoint1-primary"
               for t in [b.content for b in s.blocks if b.kind == "table"] if t.slug.endswith("primary_differences"))
    assert row["Full table"] == own.number


def test_glance_p_values_are_not_called_decisions_and_an_interim_says_so(results):
    interim = copy.deepcopy(results)
    interim["multiplicity"] = {"method": "holm", "sequential": {"planned_look": True, "look": 1, "looks": 2}}
    section = next(s for s in build_document(interim, draw=False).sections if s.title == GLANCE_TITLE)
    closing = section.blocks[-1].content
    assert "group-sequential boundaries" in closing and "Interim look 1 of 2" in closing
    assert "rejected" not in closing


# --------------------------------------------------------------------------- the demo plan on a small cut
def _demo_plan_quick():
    """The demo plan with few imputations and shifts: what is checked does not depend on how many."""
    from trialcut.plan.schema import AnalysisPlan

    data = yaml.safe_load((ROOT / "analysis_plans" / "demo.yaml").read_text(encoding="utf-8"))
    for endpoint in data["endpoints"]:
        for analysis in endpoint["analyses"].get("sensitivity") or []:
            options = analysis.get("options") or {}
            if "imputations" in options:
                options.update(imputations=2, burn_in=20, thinning=1, chains=1)
            if "shifts" in options:
                options.update(shifts=[0, 10], reference_shifts=[0])
    return AnalysisPlan.model_validate(data)


def test_glance_numbers_print_as_the_primary_tables_on_the_demo():
    from trialcut.data.prepare import prepare_cut
    from trialcut.data.readers import raw_from_frame
    from trialcut.data.simulate import demo_cut_offs, demo_cuts
    from trialcut.run import runner
    from trialcut.run.context import RunContext

    plan = _demo_plan_quick()
    cut = prepare_cut(plan, raw_from_frame(demo_cuts(20261202, 120)["final"]), cut_off=demo_cut_offs()["final"],
                      today=dt.date(2026, 12, 2))
    dumped = plan.model_dump(mode="json")    # what the report reads of the plan, as the run command records it
    plan_block = {key: dumped[key] for key in ("study", "columns", "arms", "visits", "populations",
                                               "intercurrent_events", "estimands", "multiplicity", "report")}
    demo = runner.run_plan(plan, cut, RunContext(root_seed=plan.seed), plan_block=plan_block, data_block={},
                           run_block={})
    document = build_document(demo, draw=False)
    endpoints = len(demo["endpoints"])
    assert _check_against_own_tables(document, demo) == 2 * endpoints
    rows = _cells(_glance(document))
    measures = {row["Endpoint"]: row["Effect measure"] for row in rows}
    assert any(m.startswith("rate ratio") for m in measures.values()), measures
    assert any(m.startswith("difference in means") for m in measures.values()), measures
    titles = [t.title for t in [*document.tables, *document.csv_tables]]
    assert len(titles) == len(set(titles))
