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
from trialcut.report.sections_flow import flow_section, listings_section
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
    primary, other = changed["endpoints"][0]["analyses"][:2]
    other.update(estimand=primary.get("estimand"), population=primary.get("population"), label="Model, other")
    section = listings_section(changed, NumberFormat.from_results(results))
    listing = next(t for t in _section_tables(section) if t.title.startswith("Participants without any value"))
    # Labels hold commas, so the names are kept apart by semicolons.
    assert "(Repeated-measures model, primary; Model, other" in listing.title
    assert primary["id"] not in listing.title


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


# --------------------------------------------------------------------------- binary endpoint
def test_responders_by_arm_and_visit_count_ones_over_non_missing():
    # Checked against pandas' own crosstab of the same invented 0/1 values (a general-purpose library).
    import numpy as np
    import pandas as pd

    from trialcut.stats.descriptive import responders_by_arm_visit

    rng = np.random.default_rng(11)
    frame = pd.DataFrame({"s": np.repeat(np.arange(40), 2), "a": np.repeat(["P", "A"], 40),
                          "v": np.tile(["W1", "W2"], 40)})
    frame["r"] = np.where(rng.random(80) < 0.2, np.nan, (rng.random(80) < 0.4).astype(float))
    table = responders_by_arm_visit(frame, subject="s", arm="a", visit="v", column="r")
    kept = frame.dropna(subset=["r"])
    expected = pd.crosstab([kept["a"], kept["v"]], kept["r"])
    for row in table.itertuples():
        assert row.responders == expected.loc[(row.arm, row.visit), 1.0]
        assert row.n == expected.loc[(row.arm, row.visit)].sum()
        assert row.proportion == pytest.approx(row.responders / row.n)


def _binary_results(results) -> dict:
    changed = copy.deepcopy(results)
    endpoint = changed["endpoints"][0]
    endpoint.update(type="binary", label="Response, score improved by 8 points (lower is better)")
    endpoint["descriptive"] = {"title": "Responders", "columns": ["arm", "visit", "n", "not_yet_due", "responders",
                                                                   "proportion"],
                               "data": [["Placebo", "Week 12", 40, 0, 10, 0.25],
                                        ["Lorvatide 20 mg", "Week 12", 50, 0, 30, 0.6]]}
    return changed


def test_a_binary_endpoint_shows_responders_and_plots_the_proportion_not_the_score(results):
    from trialcut.report.sections_analysis import descriptive

    changed = _binary_results(results)
    context = EndpointContext(changed, changed["endpoints"][0], NumberFormat.from_results(changed))
    assert context.y_label == "Proportion responding"
    section = Section("descriptive", "Descriptive statistics")
    descriptive(section, context)
    table = _section_tables(section)[0]
    labels = [c.label for c in table.header()]
    assert "Responders" in labels and "Proportion responding" in labels and "Mean" not in " ".join(labels)
    figures = [b.content for b in section.blocks if b.kind == "figure"]
    assert [f.title.startswith("Observed proportion responding") for f in figures] == [True]   # no trajectories
    # A continuous endpoint keeps its score summary, its axis and its trajectories.
    plain = EndpointContext(results, results["endpoints"][0], NumberFormat.from_results(results))
    assert plain.y_label != "Proportion responding"
    section = Section("descriptive", "Descriptive statistics")
    descriptive(section, plain)
    assert len([b for b in section.blocks if b.kind == "figure"]) == 2


def test_a_run_of_a_binary_endpoint_records_its_type_and_its_responders(tmp_path):
    # Responders counted by hand from the bad-input cases' base cut with plain pandas.
    import pandas as pd

    from tests.run.test_responder_run import BASE, _run

    endpoint = {"id": "responder", "label": "Responder", "type": "binary", "parameter": "FBS", "analysed": "change",
                "primary_visit": "Week 12",
                "response": {"threshold": -4, "direction": "at_most", "missing": "leave_out"},
                "analyses": {"primary": {"id": "at_week_12", "label": "Week 12", "method": "proportions",
                                         "estimand": "primary"}}}
    entry = _run(tmp_path, [endpoint])["endpoints"][0]
    assert entry["type"] == "binary"
    shown = pd.DataFrame(entry["descriptive"]["data"], columns=entry["descriptive"]["columns"])
    assert {"responders", "proportion"} <= set(shown.columns) and "mean" not in shown.columns
    data = pd.read_csv(BASE / "data.csv")
    week12 = data[(data["AVISIT"] == "Week 12") & (data["FASFL"] == "Y") & data["CHG"].notna()]
    expected = week12.assign(r=week12["CHG"] <= -4).groupby("TRT01P")["r"].agg(["sum", "size"])
    at_12 = shown[shown["visit"] == "Week 12"].set_index("arm")
    for arm, row in expected.iterrows():
        assert at_12.loc[arm, "responders"] == row["sum"] and at_12.loc[arm, "n"] == row["size"]


# --------------------------------------------------------------------------- group-sequential consistency
def test_a_later_look_recomputes_an_earlier_look_at_the_fraction_it_reached():
    # The demo's final report recomputed look 1 at 0.500 while the interim had used 0.493. Expected
    # boundaries come from the statistics layer (checked against published tables in
    # tests/external/test_group_sequential_reference.py).
    from trialcut.run.interim import interim_multiplicity
    from trialcut.run.tables import frame_of
    from trialcut.stats.group_sequential import boundaries

    from tests.run.test_interim import _cut, _hypotheses, _plan

    run = {"cut": "final", "earlier_looks": [{"cut": "interim", "run_id": "r1", "information_reached": 0.493}]}
    out = interim_multiplicity(_plan(), _cut(n_due=93), {"run": run}, _hypotheses(0.02, 0.03))
    facts = out["sequential"]
    assert facts["fractions_used"] == [0.493, 1.0]
    expected = boundaries([0.493, 1.0], alpha=0.05, spending="obrien_fleming_type")
    assert frame_of(facts["boundaries"])["boundary_z"].tolist() == pytest.approx(list(expected.z))
    assert any("0.493, the fraction it reached (run r1)" in c for c in facts["cautions"])
    # Without a recorded earlier run the planned fraction is used, and the report says so.
    out = interim_multiplicity(_plan(), _cut(n_due=93), {"run": {"cut": "final"}}, _hypotheses(0.02, 0.03))
    assert out["sequential"]["fractions_used"] == [0.5, 1.0]
    assert any("0.500, its planned fraction" in c for c in out["sequential"]["cautions"])


def test_the_command_layer_reads_the_fraction_an_earlier_look_reached_from_the_registry(tmp_path):
    import json

    from trialcut.commands import earlier_looks
    from trialcut.record.registry import append_run

    from tests.run.test_interim import _plan

    plan = _plan()
    folder = tmp_path / "run1"
    folder.mkdir()
    (folder / "results.json").write_text(json.dumps({"multiplicity": {"sequential": {
        "cut": "interim", "planned_look": True, "information_reached": 0.493}}}))
    (folder / "MANIFEST.sha256").write_text("")
    registry = tmp_path / "registry.sqlite"
    append_run(registry, {"kind": "run", "record_id": "20261202T000000Z-abcdef", "study_id": plan.study.id,
                          "cut": "interim", "folder": "run1", "plan_sha256": "0" * 64, "lock_status": "locked",
                          "dummy_arms": False, "data_sha256": "0" * 64, "manifest_sha256": "0" * 64})
    assert earlier_looks(registry, plan, "final") == [
        {"cut": "interim", "run_id": "20261202T000000Z-abcdef", "information_reached": 0.493}]
    assert earlier_looks(registry, plan, "interim") == []          # the first look has nothing before it
    assert earlier_looks(tmp_path / "none.sqlite", plan, "final") == []


def test_a_reproduction_uses_the_fractions_its_run_recorded_not_its_scratch_registry(tmp_path, monkeypatch):
    # A reproduction runs into an empty scratch registry: reading the earlier looks from there would
    # put look 1 back at its planned fraction and change every boundary of the final look.
    import json

    import trialcut.commands as commands
    from trialcut.commands_reproduce import reproduce_run

    recorded = [{"cut": "interim", "run_id": "r1", "information_reached": 0.493}]
    folder = tmp_path / "run"
    (folder / "plan").mkdir(parents=True)
    (folder / "plan" / "plan.yaml").write_text("")
    (folder / "results.json").write_text(json.dumps({
        "run": {"id": "r2", "cut": "final", "unlocked": False, "dummy_arms_seed": None, "earlier_looks": recorded},
        "plan": {"file": "plan.yaml"}, "data": {}}))
    (folder / "audit.json").write_text("{}")
    seen = {}

    class Stop(Exception):
        pass

    def execute_run(**kwargs):
        seen.update(kwargs)
        raise Stop

    monkeypatch.setattr(commands, "execute_run", execute_run)
    with pytest.raises(Stop):
        reproduce_run(folder, tmp_path / "data.csv", tmp_path / "scratch", 1e-9)
    assert seen["looks_before"] == recorded
