"""What a reviewer stopped at when reading the demo's interim and final reports (helper R's pass).

Each test renders a piece of the report from the invented LVT-201 rendering fixture
(tests/report/fixtures.py) and checks what a reader sees: counts that reconcile, marks that
keep categories apart, decimals that agree between a sentence and its table, and no decision
wording at an interim look.  The arithmetic checked (due = observed + missing; in the fit +
left out + not yet due = population) is the participant-flow identity of issue 8 (common
practice in a CONSORT-style flow: every participant is counted once).
"""
from __future__ import annotations

import copy

import pytest

from trialcut.report.blocks import Section
from trialcut.report.compare import _decisions_section, compare_decisions
from trialcut.report.context import EndpointContext
from trialcut.report.document import build_document
from trialcut.report.formatting import NumberFormat
from trialcut.report.sections_analysis import (NOT_DUE_MARK, _marks, _model_fit_facts, interim_level_caution,
                                               missing_data)
from trialcut.report.sections_sequential import multiplicity_by_look


@pytest.fixture(scope="module")
def results(report_fixtures):
    return report_fixtures.build_results()


def _context(results, **endpoint_changes):
    endpoint = {**results["endpoints"][0], **endpoint_changes}
    return EndpointContext(results, endpoint, NumberFormat.from_results(results))


def _texts(table):
    return [[text for text, _ in row] for row in table.body()]


# --------------------------------------------------------------------------- favours direction
def test_plan_key_better_sets_the_favoured_side_whatever_the_label_says(results):
    # The label says nothing about direction; the plan's key decides.
    plain = "Change from baseline in the example score"
    assert _context(results, label=plain, better="lower").favours_words() == ("favours the active arm",
                                                                             "favours Placebo")
    assert _context(results, label=plain, better="higher").favours_words() == ("favours Placebo",
                                                                              "favours the active arm")
    # The key wins over a label that says the opposite.
    assert _context(results, label="Score (higher is worse)", better="higher").better == "higher"


def test_without_the_key_the_label_is_read_and_else_no_direction_is_claimed(results):
    assert _context(results, label="Score (higher is worse)", better=None).better == "lower"
    assert _context(results, label="Score (0-60)", better=None).favours_words() is None


# --------------------------------------------------------------------------- missing patterns
def test_a_visit_not_yet_due_keeps_its_own_mark_in_the_pattern_table():
    # Stored X/./- (used, missing or set aside, not yet due): two different patterns must not print alike.
    assert _marks("XXX.") != _marks("XXX-")
    assert _marks("XX--") == "■■" + NOT_DUE_MARK * 2
    assert _marks("----").count(NOT_DUE_MARK) == 4


def _section_tables(section: Section):
    found = [b.content for b in section.blocks if b.kind == "table"]
    for child in section.subsections:
        found += _section_tables(child)
    return found


def _paragraphs(section: Section):
    return [b.content for b in section.blocks if b.kind == "paragraph"]


def test_missing_value_table_says_observed_includes_set_aside_so_due_adds_up(results):
    section = Section("missing", "Missing data")
    missing_data(section, _context(results))
    table = next(t for t in _section_tables(section) if t.title.startswith("Missing values of the primary analysis"))
    labels = [c.label for c in table.header()]
    assert any("set aside included" in label for label in labels)
    assert any("Due = observed + missing" in note for note in table.footnotes)


# --------------------------------------------------------------------------- fit counts reconcile
def test_fit_table_counts_add_up_to_the_population_with_the_participants_not_yet_due(results):
    analysis = copy.deepcopy(results["endpoints"][0]["analyses"][0])
    analysis["fit"] = {**analysis.get("fit", {}), "n_subjects": 232, "n_subjects_excluded": 2}
    analysis["left_out"] = {"title": "left out", "columns": ["participant", "arm", "reason"],
                            "data": [["P1", "Placebo", "every observed value set aside by the strategy"],
                                     ["P2", "Placebo", "no value at any due visit"],
                                     *[[f"Q{i}", "Placebo", "no visit due yet"] for i in range(23)]]}
    table = _model_fit_facts(_context(results), analysis["fit"], analysis)
    facts = {row[0]: row[1] for row in _texts(table)}
    assert facts["Participants in the fit"] == "232"
    assert facts["Participants with a visit due but no value used (left out)"] == "2"
    assert facts["Participants with no visit due yet (not in the fit)"] == "23"
    assert 232 + 2 + 23 == 257   # the population of the flow table this mirrors


# --------------------------------------------------------------------------- interim wording
def _sequential(look: int, looks: int = 2) -> dict:
    return {
        "method": "holm", "alpha": 0.05,
        "sequential": {"cut": "interim", "looks": looks, "look": look, "planned_look": True,
                       "spending": "obrien_fleming_type", "information_reached": 0.49333,
                       "information_basis": "participants due", "fractions_used": [0.49333],
                       "boundaries": {"title": "Boundaries", "columns": ["look", "information_fraction",
                                                                         "cumulative_alpha", "boundary_z", "boundary_p"],
                                      "data": [[1, 0.49333, 0.0052631, 2.79047, 0.0052631]]}},
        "hypotheses": {"title": "Group-sequential tests", "columns": [
            "id", "analysis", "arm", "visit", "weight", "p", "tested", "local_alpha", "boundary_z", "boundary_p",
            "crossed_alone", "crossed_adjusted"], "data": [
            ["h1", "mmrm_primary", "Lorvatide 20 mg", "Week 12", 0.5, 1.33e-5, True, 0.025, 3.19105, 0.0014170,
             True, True],
            ["h2", "mmrm_primary", "Lorvatide 10 mg", "Week 12", 0.5, 0.011, True, 0.05, 2.79047, 0.0052631,
             False, False]]},
    }


def test_group_sequential_columns_keep_one_number_of_decimals_each(results):
    section = Section("multiplicity", "Multiple comparisons")
    multiplicity_by_look(section, {"multiplicity": _sequential(1)}, NumberFormat.from_results(results), {})
    tables = _section_tables(section)
    tests = _texts(tables[0])
    header = [c.label for c in tables[0].header()]
    z = [row[header.index("Boundary |z|")] for row in tests]
    held = [row[header.index("Alpha held")] for row in tests]
    assert z == ["3.191", "2.790"] and held == ["0.025", "0.050"]
    # The boundaries table gives the fraction as the sentence does (0.493), and p as "p ≤ 0.00526".
    boundaries = _texts(tables[1])[0]
    assert "0.493" in boundaries and "0.00526" in boundaries
    sentence = next(text for text in _paragraphs(section) if "Interim look" in text)
    assert "0.493" in sentence and "2.790" in sentence and "0.00526" in sentence


def test_an_interim_look_says_so_on_every_page_and_first_among_the_cautions(results):
    # An interim must never be read as a final (common practice for group-sequential reports): the
    # running header of every page, the cover's kicker and the first caution name the look.
    interim = copy.deepcopy(results)
    interim["multiplicity"] = _sequential(1)
    document = build_document(interim, draw=False)
    assert document.header_text.startswith("INTERIM LOOK 1 OF 2 · ")
    assert document.kicker == ("Interim analysis, look 1 of 2, from a prespecified, locked plan: "
                               "not the final analysis")
    assert document.cautions[0].startswith("Interim look 1 of 2: not the final analysis; decisions")
    assert any("qualified statistician" in c for c in document.cautions[1:])
    unplanned = copy.deepcopy(interim)
    unplanned["multiplicity"]["sequential"]["planned_look"] = False
    assert build_document(unplanned, draw=False).header_text.startswith("NOT A PLANNED LOOK · ")
    final = copy.deepcopy(interim)
    final["multiplicity"] = _sequential(2)
    document = build_document(final, draw=False)
    assert not document.marks and document.kicker == "Efficacy analyses run from a prespecified, locked plan"


def test_comparison_never_calls_an_interim_crossing_a_rejection(results):
    final = _sequential(2)
    final["sequential"] = {**final["sequential"], "cut": "final"}
    record = compare_decisions({"multiplicity": _sequential(1)}, {"multiplicity": final})
    assert record["interim_a"] and not record["interim_b"]
    section = _decisions_section(record, NumberFormat.from_results(results))
    table = _section_tables(section)[0]
    labels = [c.label for c in table.header()]
    assert "Boundary crossed (interim) A" in labels and "Rejected A" not in labels and "Rejected B" in labels
    # A p-value is readable against its boundary: never '<0.001' beside a boundary of 0.001.
    first = dict(zip(labels, _texts(table)[0]))
    assert first["p-value A"] == "1.33 × 10⁻⁵" and first["Boundary p-value A"] == "0.00142"


def test_tipping_point_at_an_interim_look_says_its_level_is_nominal():
    assert "no decision follows" in interim_level_caution({"multiplicity": _sequential(1)}, 0.05)
    assert interim_level_caution({"multiplicity": _sequential(2)}, 0.05) == ""
    assert interim_level_caution({"multiplicity": {"method": "holm"}}, 0.05) == ""


# --------------------------------------------------------------------------- layout
def test_a_short_table_is_never_split_across_pages(results):
    # The demo comparison left one row of a two-row table alone on its last page (WeasyPrint honours
    # break-inside: avoid on blocks, TOOLCHAIN.md); the class must reach every short table.
    from pathlib import Path

    from trialcut.report.document import build_document
    from trialcut.report.render import render_html

    html = render_html(build_document(results, draw=False))
    assert 'class="table-block short"' in html
    css = (Path(__file__).resolve().parents[2] / "templates" / "report.css").read_text(encoding="utf-8")
    assert ".table-block.short { break-inside: avoid; }" in css


# --------------------------------------------------------------------------- all-analyses table
def test_all_analyses_table_names_every_population_its_rows_use(results):
    # In the demo a per-protocol row sat under a title and header naming the full analysis set only.
    from trialcut.report.sections_analysis import sensitivity

    changed = copy.deepcopy(results)
    endpoint = changed["endpoints"][0]
    endpoint["analyses"][1]["population"] = "safety"
    section = Section("sensitivity", "Sensitivity")
    sensitivity(section, _context(changed), endpoint["analyses"][0], endpoint["analyses"][1:])
    table = next(t for t in _section_tables(section) if "every analysis" in t.title)
    assert "full analysis set or safety set" in table.title
    assert "Full analysis set: Placebo N =" in table.counts and "Safety set: Placebo N = 60" in table.counts
    # With one population the title names it alone.
    section = Section("sensitivity", "Sensitivity")
    sensitivity(section, _context(results), results["endpoints"][0]["analyses"][0],
                results["endpoints"][0]["analyses"][1:])
    table = next(t for t in _section_tables(section) if "every analysis" in t.title)
    assert table.title.endswith("every analysis; full analysis set")


def test_profile_figures_say_which_data_and_which_analysis_they_show(results):
    # A figure pasted alone must say what it summarises: the observed data of a population, or one fit.
    document = build_document(results, draw=False)
    figures = {f.title: f for f in document.figures}
    observed = next(f for title, f in figures.items() if title.startswith("Observed mean"))
    assert "full analysis set" in observed.note and "as recorded" in observed.note
    model = next(f for title, f in figures.items() if title.startswith("Model-estimated mean profile"))
    primary = results["endpoints"][0]["analyses"][0]
    assert (primary.get("label") or primary["id"]) in model.note


def test_an_imputation_by_reason_is_not_footnoted_as_missing_at_random(results):
    # The demo's by-reason analysis (jump to reference after an adverse event or lack of efficacy)
    # carried the footnote "Imputation under missing at random".
    from trialcut.report.sections_analysis import _model_footnote

    analysis = {"method": "multiple_imputation", "options": {
        "assumption": "mar", "imputations": 50, "covariates": ["BASE"],
        "assumptions_by_reason": [
            {"event": "stop", "reasons": ["Adverse event", "Lack of efficacy"], "assumption": "jump_to_reference"},
            {"event": "stop", "reasons": ["Other"], "assumption": "mar"}]}, "fit": {}}
    footnote = _model_footnote(_context(results), analysis)
    assert not footnote.startswith("Imputation under missing at random")
    assert ("jump to reference after study treatment stopped early (Adverse event, Lack of efficacy)"
            in footnote)
    plain = {"method": "multiple_imputation", "options": {"assumption": "copy_increments_in_reference",
                                                          "imputations": 50}, "fit": {}}
    assert _model_footnote(_context(results), plain).startswith("Imputation under copy increments in reference")


def test_tipping_map_ticks_print_shifts_as_the_tables_do():
    # The map's axes said "-5" and "0" where the table beside it says "-5.0" and "0.0".
    import re

    from trialcut.report import figures

    cells = [{"arm": "Lorvatide 10 mg", "shift": shift, "reference_shift": reference, "estimate": -1.0 + shift / 10,
              "p": 0.01 if shift < 10 else 0.2} for shift in (0.0, 5.0, 10.0) for reference in (-5.0, 0.0)]
    svg = figures.tipping_chart(cells, arms=["Lorvatide 10 mg"], alpha=0.05,
                                shift_label=lambda value: f"{value:.1f}").decode("utf-8")
    texts = set(re.findall(r">([^<>]+)</text>", svg))
    assert {"-5.0", "0.0", "5.0", "10.0"} <= texts and "-5" not in texts


# --------------------------------------------------------------------------- binary and count endpoints
def _gee_analysis():
    return {"id": "gee_responder", "label": "Responders at every visit", "method": "gee", "role": "primary",
            "estimand": "main", "population": "fas", "status": "ok", "options": {},
            "fit": {"family": "binomial", "n_subjects": 234, "effect": "risk_difference",
                    "missing_rule": "non_response"},
            "tables": {"differences": {"title": "d", "columns": [
                "arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper", "effect"], "data": [
                ["Lorvatide 10 mg", "Placebo", "Week 12", 0.0712, 0.06, None, 1.19, 0.23, -0.046, 0.188,
                 "risk_difference"]]},
                "joint_tests": {"title": "j", "columns": ["term", "num_df", "chi_square", "p"],
                                "data": [["arm_by_visit", 6, 6.6, 0.359]]}}}


def test_a_risk_difference_keeps_its_decimals_and_every_label_is_in_words(results):
    # The demo printed a risk difference of 0.07 as "0.1", its effect as "risk_difference", a z as "t",
    # an empty DF column, "arm_by_visit", "N subjects" and "non_response".
    from trialcut.report.sections_analysis import generic_analysis

    section = Section("gee", "GEE")
    generic_analysis(section, _context(results), _gee_analysis())
    tables = _section_tables(section)
    differences = next(t for t in tables if "Differences from" in t.title)
    header = [c.label for c in differences.header()]
    row = dict(zip(header, _texts(differences)[0]))
    assert row["Estimate"] == "0.071" and row["Effect measure"] == "risk difference"
    assert "z" in header and "t" not in header and "DF" not in header
    joint = next(t for t in tables if t is not differences and "Effect measure" not in t.title
                 and any("Arm by visit" in cell for cell in sum(_texts(t), [])))
    assert joint is not None
    words = " ".join(" ".join(sum(_texts(t), [])) for t in tables) + " ".join(_paragraphs(section))
    for raw in ("risk_difference", "arm_by_visit", "non_response", "N subjects", "not described further"):
        assert raw not in words


def test_trajectory_panel_titles_put_the_count_on_its_own_line():
    # With a long y-axis title the panels narrowed and "Lorvatide 10 mg (n = 23)" ran into the next title.
    import re

    from trialcut.report import figures

    svg = figures.trajectories_chart({"Lorvatide 10 mg": {"P1": [("Week 2", 1.0), ("Week 4", 2.0)]}},
                                     arms=["Placebo", "Lorvatide 10 mg"], visits=["Week 2", "Week 4"],
                                     visit_days={"Week 2": 14, "Week 4": 28},
                                     y_label="Change from baseline in a score with a long name").decode("utf-8")
    texts = re.findall(r">([^<>]+)</text>", svg)
    assert "Lorvatide 10 mg" in texts and "(n = 1)" in texts


def _with_second_endpoint(results: dict) -> dict:
    """The results with a copy of the first endpoint as a second one (ids and label of its own)."""
    two = copy.deepcopy(results)
    second = copy.deepcopy(two["endpoints"][0])
    second["id"], second["label"] = "second_score", "Change from baseline in a second score (invented)"
    for analysis in second["analyses"]:
        analysis["id"] = f"{analysis['id']}_second"
    two["endpoints"].append(second)
    return two


def test_with_two_endpoints_every_table_title_is_still_unique(results):
    # With the responder and count endpoints in the demo, "Missing values of the primary analysis by arm and
    # visit; full analysis set" and the flow tables appeared once per endpoint under the same title.
    two = _with_second_endpoint(results)
    document = build_document(two, draw=False)
    titles = [t.title for t in [*document.tables, *document.csv_tables]]
    repeated = sorted({t for t in titles if titles.count(t) > 1})
    assert not repeated, repeated


def test_subgroup_tests_of_two_endpoints_have_titles_of_their_own(results):
    # The demo's three endpoints each printed "Test of equal effects across the levels of Sex (...)".
    two = _with_second_endpoint(results)
    for endpoint in two["endpoints"]:
        endpoint["subgroups"] = [{
            "id": "sex", "label": "Sex", "column": "SEX", "analysis": endpoint["analyses"][0]["id"],
            "caution": "Subgroup results are exploratory.", "notes": [],
            "levels": {"title": f"{endpoint['label']}: effect within each level of Sex",
                       "columns": ["level", "arm", "estimate", "lower", "upper", "p"],
                       "data": [["F", "Lorvatide 10 mg", -1.0, -2.0, 0.0, 0.05]]},
            "interaction": {"title": "Test of equal effects across the levels of Sex",
                            "columns": ["arm", "statistic", "num_df", "p"],
                            "data": [["Lorvatide 10 mg", 0.03, 1, 0.86]]}}]
    document = build_document(two, draw=False)
    titles = [t.title for t in [*document.tables, *document.csv_tables]]
    tests = [t for t in titles if t.startswith("Test of equal effects")]
    assert len(tests) == 2 and len(set(tests)) == 2, tests


def test_an_all_analyses_summary_of_rate_ratios_is_not_called_a_difference(results):
    # The count endpoint's summary said "Estimated difference from Placebo" and "each arm minus Placebo"
    # of rate ratios, and its forest plot marked no effect at 0.
    from trialcut.report.sections_analysis import sensitivity

    primary = _gee_analysis()
    primary["fit"]["effect"] = "rate_ratio"
    row = primary["tables"]["differences"]["data"][0]
    row[3], row[8], row[9], row[10] = 0.62, 0.41, 0.93, "rate_ratio"
    section = Section("sensitivity", "Sensitivity")
    sensitivity(section, _context(results), primary, [])
    table = next(t for t in _section_tables(section) if "every analysis" in t.title)
    assert table.title.startswith("Estimated rate ratio to Placebo")
    assert any(note.startswith("Ratios are each arm over Placebo") for note in table.footnotes)
    figure = next(b.content for b in section.blocks if b.kind == "figure")
    assert figure.title.startswith("Estimated rate ratio to Placebo")
    assert dict(zip([c.label for c in table.header()], _texts(table)[0]))["Estimate"] == "0.620"


def test_subgroup_tables_leave_out_columns_that_say_nothing(results):
    # The demo's subgroup tables showed "Status: ok" and an empty "Note" on every row, the raw test name
    # "equal_effects", and rate ratios of 0.85 as "0.9".
    from trialcut.report.sections_responder import subgroups

    endpoint = copy.deepcopy(results["endpoints"][0])
    primary = _gee_analysis()
    endpoint["analyses"] = [primary]
    endpoint["subgroups"] = [{
        "id": "sex", "label": "Sex", "caution": "Exploratory.", "notes": [],
        "levels": {"title": "Effect within each level of Sex", "columns": [
            "level", "arm", "reference", "n_arm", "n_reference", "status", "estimate", "se", "lower", "upper", "p",
            "note"], "data": [["F", "Lorvatide 10 mg", "Placebo", 50, 49, "ok", 0.85, 0.17, 0.61, 1.19, 0.355, ""]]},
        "interaction": {"title": "Test of equal effects across the levels of Sex",
                        "columns": ["arm", "test", "statistic", "num_df", "p"],
                        "data": [["Lorvatide 10 mg", "equal_effects", 0.96, 1, 0.327]]}}]
    section = Section("subgroups", "Subgroups")
    subgroups(section, _context(results), endpoint)
    levels, interaction = _section_tables(section)[:2]
    header = [c.label for c in levels.header()]
    assert not {"Status", "Note", "Reference"} & set(header)
    assert dict(zip(header, _texts(levels)[0]))["Estimate"] == "0.850"
    assert "equal_effects" not in sum(_texts(interaction), [])
    # Each stands alone: N per arm of the population, how the levels were fitted, what the statistic is.
    for table in (levels, interaction):
        assert " N = " in table.counts and any(n.startswith("Source: ") for n in table.footnotes), table.title
    assert "Chi-square" in [c.label for c in interaction.header()]
    assert any("Cochran" in note for note in interaction.footnotes)


def test_a_whole_period_primary_estimate_is_in_the_all_analyses_summary(results):
    # The count endpoint's primary (a rate over the whole period) was missing from "every analysis".
    from trialcut.report.sections_analysis import _estimates_at_primary_visit

    primary = _gee_analysis()
    primary["tables"]["differences"]["data"][0][2] = "Whole period"
    rows = _estimates_at_primary_visit(_context(results), [primary])
    assert len(rows) == 1 and rows[0]["label"].endswith(": whole period") and rows[0]["primary"]


def test_a_table_of_rate_ratios_is_titled_as_ratios(results):
    from trialcut.report.sections_analysis import generic_analysis

    analysis = _gee_analysis()
    analysis["tables"]["differences"]["data"][0][10] = "rate_ratio"
    section = Section("rate", "Rate")
    generic_analysis(section, _context(results), analysis)
    titles = [t.title for t in _section_tables(section)]
    assert any(t.startswith("Rate ratios to Placebo by visit") for t in titles), titles
    assert not any(t.startswith("Differences from") for t in titles)


def test_the_timing_table_names_subgroup_steps_by_the_endpoint_label(results):
    # The demo's appendix listed "Subgroups fbs_change": an identifier where a reader expects words.
    from trialcut.report.sections_audit import _step_labels

    label = _step_labels(results)
    endpoint = results["endpoints"][0]
    assert label(f"subgroups {endpoint['id']}") == f"Subgroup analyses of {endpoint['label']}"


def test_comparison_gives_each_endpoint_its_table_and_decimals(results):
    # The demo's comparison put three endpoints' estimates in one table at the score's 1 decimal: risk
    # differences read 0.2 and rate ratios 0.8, with no column saying which endpoint a row was.
    from trialcut.report.compare import _estimates_section

    def row(endpoint, effect, estimate):
        return {"endpoint": endpoint, "analysis": "a", "label": "An analysis", "role": "primary", "arm": "Lorvatide 10 mg",
                "reference": "Placebo", "visit": "Week 12", "decimals": 0, "effect": effect,
                "estimate_a": estimate, "estimate_b": estimate, "se_a": 0.08, "se_b": 0.06, "df_a": None, "df_b": None,
                "lower_a": 0.1, "upper_a": 0.4, "lower_b": 0.1, "upper_b": 0.4, "n_a": "87/85", "n_b": "100/97",
                "change": 0.0}
    two = copy.deepcopy(results)
    second = copy.deepcopy(two["endpoints"][0])
    second["id"], second["label"] = "responder", "Responders (invented)"
    two["endpoints"].append(second)
    section = _estimates_section([row(two["endpoints"][0]["id"], None, -2.71), row("responder", "risk_difference", 0.238)],
                                 NumberFormat.from_results(results), two)
    tables = _section_tables(section)
    assert len(tables) == 2 and tables[1].title.endswith(": Responders (invented)")
    header = [c.label for c in tables[1].header()]
    assert dict(zip(header, _texts(tables[1])[0]))["Estimate A"] == "0.238"
    score = NumberFormat.from_results(results).cell(-2.71, "mean")   # the score keeps its own decimals
    assert dict(zip([c.label for c in tables[0].header()], _texts(tables[0])[0]))["Estimate A"] == score


def test_the_pattern_chart_key_with_visits_not_yet_due_stays_inside_the_figure():
    # At the interim cut the key gained "light grey: visit not yet due" and ran past the right edge.
    from trialcut.report import figures

    drawn = []
    original = figures._svg
    try:
        figures._svg = lambda figure: drawn.append(figure) or original(figure)
        figures.pattern_chart([{"arm": "Lorvatide 20 mg", "pattern": "XX--", "count": 11},
                               {"arm": "Placebo", "pattern": "X.XX", "count": 1}],
                              arms=["Placebo", "Lorvatide 20 mg"], visits=["Week 2", "Week 4", "Week 8", "Week 12"])
    finally:
        figures._svg = original
    assert drawn and figures.clipped_texts(drawn[0]) == [], figures.clipped_texts(drawn[0])
