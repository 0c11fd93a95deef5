"""What a reviewer stopped at in a second reading of the demo's interim and final reports.

Each test renders one piece of the report from the invented LVT-201 rendering fixture
(tests/report/fixtures.py) and checks what a reader sees: that a flow table says how a missing
value is attributed to an event, that wide tables are marked wide, that analyses are named by
their labels, and that the tipping-point direction follows the plan's ``better`` key (common
practice: a sensitivity analysis shifts imputed values against the treatment, i.e. towards the
worse side of the scale).
"""
from __future__ import annotations

import copy

import pytest

from trialcut.report.blocks import Section
from trialcut.report.context import EndpointContext
from trialcut.report.formatting import NumberFormat
from trialcut.report.sections_analysis import TippingReading
from trialcut.report.sections_flow import flow_section
from trialcut.report.sections_sequential import multiplicity_by_look

from tests.report.test_reviewer_reading import _section_tables, _sequential


@pytest.fixture(scope="module")
def results(report_fixtures):
    return report_fixtures.build_results()


def _with_flow(results) -> dict:
    changed = copy.deepcopy(results)
    endpoint = changed["endpoints"][0]
    primary = endpoint["analyses"][0]
    endpoint["flow"] = [{"estimand": primary.get("estimand"), "population": primary.get("population"),
                         "table": {"title": "flow", "columns": ["visit", "step", "label", "Placebo", "Total"],
                                   "data": [["Week 12", "due", "Visit due by the cut-off", 10, 10],
                                            ["Week 12", "missing_after_discontinuation",
                                             "Missing after discontinuation", 4, 4]]}}]
    primary["left_out"] = {"title": "left out", "columns": ["participant", "arm", "reason"],
                           "data": [["P1", "Placebo", "no value at any due visit"]]}
    primary["label"] = "Repeated-measures model, primary"
    return changed


def test_every_flow_table_says_how_a_missing_value_is_attributed_to_an_event(results):
    # The demo's primary and treatment-policy tables counted the same missing values under different
    # events (by design: the governing event, DEVELOPERS.md) without saying so.
    section = flow_section(_with_flow(results), NumberFormat.from_results(results))
    flows = [t for t in _section_tables(section) if t.title.startswith("Participant flow")]
    assert flows
    for table in flows:
        note = " ".join(table.footnotes)
        assert "earliest event" in note and "hypothetical or composite" in note


def test_participants_without_a_value_are_listed_under_the_analyses_labels(results):
    changed = _with_flow(results)
    section = flow_section(changed, NumberFormat.from_results(results))
    listing = next(t for t in _section_tables(section) if t.title.startswith("Participants without any value"))
    primary = changed["endpoints"][0]["analyses"][0]
    assert "Repeated-measures model, primary" in listing.title and f"({primary['id']}" not in listing.title


def test_group_sequential_tests_table_goes_on_a_wide_page(results):
    # With analysis, arm, visit, p, alpha, boundaries and two decisions it wrapped "Week 12" onto
    # three lines on a portrait page.
    section = Section("multiplicity", "Multiple comparisons")
    multiplicity_by_look(section, {"multiplicity": _sequential(1)}, NumberFormat.from_results(results), {})
    assert _section_tables(section)[0].wide


@pytest.mark.parametrize("better, estimate, against", [
    ("lower", 1.5, "A positive δ"),      # the arm sits on the worse side: the key, not the sign, decides
    ("lower", -1.5, "A positive δ"),
    ("higher", -1.5, "A negative δ"),
    ("higher", 1.5, "A negative δ"),
    (None, 1.5, "A negative δ"),         # without the key the sign of the estimate stands in
    (None, -1.5, "A positive δ"),
])
def test_tipping_direction_follows_the_plans_better_key(results, better, estimate, against):
    endpoint = {**results["endpoints"][0], "better": better, "label": "Score (0-60)"}
    context = EndpointContext(results, endpoint, NumberFormat.from_results(results))
    cells = [{"arm": "Active", "shift": 0.0, "reference_shift": 0.0, "estimate": estimate, "p": 0.01}]
    words = " ".join(TippingReading(context, {"options": {}}, cells, 0.05).method_words())
    assert f"{against} (the active arms' imputed values made" in words
