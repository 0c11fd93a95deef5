"""Loading plans: valid plans load; every mistake is reported at once, located and explained."""
from __future__ import annotations

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trialcut.errors import PlanError
from trialcut.plan.load import load_plan
from tests.plan.helpers import BASE_PLAN, DEMO_PLAN, STARTER_PLAN, line_of, replace_once


def problems_of(path):
    with pytest.raises(PlanError) as caught:
        load_plan(path)
    return caught.value.problems, caught.value.render()


# --------------------------------------------------------------------------- valid plans
@pytest.mark.parametrize("path", [DEMO_PLAN, STARTER_PLAN, BASE_PLAN], ids=["demo", "starter", "base"])
def test_the_repository_plans_load(path):
    loaded = load_plan(path)
    assert loaded.plan.study.title
    assert len(loaded.canonical_hash) == 64
    assert loaded.text == path.read_text(encoding="utf-8")


def test_demo_plan_declares_the_shared_demo_study():
    # The names the data simulator and the report rely on (issue 2's description of LVT-201).
    plan = load_plan(DEMO_PLAN).plan
    assert plan.study.id == "LVT-201" and plan.study.phase == "2"
    assert plan.arm_codes == ("Placebo", "Lorvatide 10 mg", "Lorvatide 20 mg")
    assert plan.arms.reference == "Placebo" and plan.arms.strata == ("STRAT1R",)
    assert plan.visit_labels == ("Week 2", "Week 4", "Week 8", "Week 12")
    assert [(v.order, v.day, v.window) for v in plan.visits.schedule] == [
        (1, 15, 4), (2, 29, 6), (3, 57, 10), (4, 85, 10)]
    assert plan.population("per_protocol").flag == "PPROTFL"
    assert plan.event("rescue_medication").day_column == "RESCDY"
    strategies = {h.event: h.strategy for h in plan.estimand("primary").intercurrent_events}
    assert strategies == {"treatment_discontinuation": "hypothetical", "rescue_medication": "treatment_policy"}
    endpoint = plan.endpoints[0]
    assert (endpoint.id, endpoint.parameter, endpoint.primary_visit, endpoint.range) == (
        "fbs_change", "FBS", "Week 12", (0, 60))
    sensitivity = [a.id for a in endpoint.analyses.sensitivity]
    assert sensitivity == ["mmrm_treatment_policy", "mmrm_robust", "ancova_observed", "ancova_per_protocol",
                           "mi_jump_to_reference", "mi_copy_increments", "tipping_point"]
    tipping = endpoint.analyses.sensitivity[-1].options
    assert tipping.shifts == (0, 5, 10, 15, 20, 25, 30) and tipping.imputations == 20
    assert plan.multiplicity.method == "holm" and len(plan.multiplicity.hypotheses) == 2


def test_positions_map_breadcrumbs_to_lines(base_text):
    loaded = load_plan(BASE_PLAN)
    line, column = loaded.position("endpoints[fbs_change].analyses.primary.options.covariance")
    assert line == line_of(base_text, "covariance: [unstructured, ar1]")
    assert column == base_text.splitlines()[line - 1].index("covariance") + 1
    assert loaded.position("visits.schedule[Week 8]")[0] == line_of(base_text, "label: Week 8")


# --------------------------------------------------------------------------- many problems at once
def test_three_mistakes_give_three_located_problems(base_text, write_plan):
    text = replace_once(base_text, "reference: Placebo", "reference: Placbo")
    text = replace_once(text, "covariance: [unstructured, ar1]", "covariance: [unstructred, ar1]")
    text = replace_once(text, "decimals: 0", "decimals: lots")
    path = write_plan(text)
    problems, rendered = problems_of(path)
    assert len(problems) == 3, rendered
    by_field = {p.field: p for p in problems}
    assert set(by_field) == {
        "arms.reference",
        "endpoints[fbs_change].analyses.primary.options.covariance[0]",
        "endpoints[fbs_change].decimals",
    }
    assert by_field["arms.reference"].line == line_of(text, "reference: Placbo")
    assert by_field["arms.reference"].hint == "did you mean 'Placebo'?"
    covariance = by_field["endpoints[fbs_change].analyses.primary.options.covariance[0]"]
    assert covariance.line == line_of(text, "unstructred")
    assert covariance.column == text.splitlines()[covariance.line - 1].index("unstructred") + 1
    assert covariance.hint == "did you mean 'unstructured'?"
    assert covariance.expected.startswith("one of unstructured, toeplitz")
    assert by_field["endpoints[fbs_change].decimals"].expected == "a whole number"
    assert {p.file for p in problems} == {str(path)}
    assert "pydantic" not in rendered and "Input should be" not in rendered
    assert "3 problems" in rendered


def test_problems_come_in_file_order(base_text, write_plan):
    text = replace_once(base_text, "seed: 7", "seed: -7")
    text = replace_once(text, 'title: Bad-input case base plan (invented example)', "title: ''")
    problems, _ = problems_of(write_plan(text))
    assert [p.line for p in problems] == sorted(p.line for p in problems)
    assert [p.field for p in problems] == ["study.title", "seed"]


def test_unknown_keys_are_named_with_a_suggestion(base_text, write_plan):
    text = replace_once(base_text, "covariates: [BASE]\n          df", "covarites: [BASE]\n          df")
    text = replace_once(text, "seed: 7", "seed: 7\nsead: 3")
    problems, _ = problems_of(write_plan(text))
    hints = {p.field: (p.hint, p.line, p.column) for p in problems}
    assert hints["endpoints[fbs_change].analyses.primary.options.covarites"] == (
        "did you mean 'covariates'?", line_of(text, "covarites"), 11)
    assert hints["sead"] == ("did you mean 'seed'?", line_of(text, "sead"), 1)


def test_a_number_where_text_is_expected_suggests_quotes(base_text, write_plan):
    problems, _ = problems_of(write_plan(replace_once(base_text, 'phase: "2"', "phase: 2")))
    assert [(p.field, p.hint) for p in problems] == [("study.phase", 'put it in quotes: "2"')]


@pytest.mark.parametrize("old, new, field", [
    ("seed: 7", "seed: yes", "seed"),
    ("day: 15,", "day: on,", "visits.schedule[Week 2].day"),
])
def test_yaml_true_false_words_are_not_numbers(base_text, write_plan, old, new, field):
    # YAML 1.1 reads yes/no/on/off as true/false and pydantic would read true as 1.
    problems, _ = problems_of(write_plan(replace_once(base_text, old, new)))
    assert [(p.field, p.code) for p in problems] == [(field, "plan.wrong_type")]
    assert "true/false" in problems[0].hint


def test_a_pair_with_one_value(base_text, write_plan):
    problems, _ = problems_of(write_plan(replace_once(base_text, "range: [0, 60]", "range: [60]")))
    assert [(p.field, p.expected, p.got) for p in problems] == [
        ("endpoints[fbs_change].range", "2 items", "1 item")]


def test_the_analysis_method_tag_is_not_part_of_the_path(base_text, write_plan):
    text = replace_once(base_text, "df: kenward_roger", "df: kenward")
    problems, _ = problems_of(write_plan(text))
    assert [p.field for p in problems] == ["endpoints[fbs_change].analyses.primary.options.df"]
    assert problems[0].hint == "did you mean 'kenward_roger'?"


def test_sensitivity_analyses_are_named_by_id(base_text, write_plan):
    text = replace_once(base_text, "visits: primary", "visits: 12")
    problems, _ = problems_of(write_plan(text))
    assert len(problems) == 1
    assert problems[0].field == "endpoints[fbs_change].analyses.sensitivity[ancova_observed].options.visits"
    assert "a list" in problems[0].expected and "all, primary" in problems[0].expected


# --------------------------------------------------------------------------- rules across fields
@pytest.mark.parametrize("old, new, field, fragment", [
    ("- {label: Week 4, order: 2", "- {label: Week 4, order: 1", "visits.schedule[Week 4].order",
     "visit orders must increase"),
    ("- {label: Week 8, order: 3", "- {label: Week 4, order: 3", "visits.schedule[Week 4].label",
     "used twice"),
    ("population: full_analysis", "population: full_analysys", "estimands[primary].population",
     "not declared"),
    ("primary_visit: Week 12", "primary_visit: Week 13", "endpoints[fbs_change].primary_visit",
     "not a scheduled visit"),
    ("df: kenward_roger", "df: kenward_roger\n          method: ml",
     "endpoints[fbs_change].analyses.primary.options.df", "needs method 'reml'"),
    ("strategy: hypothetical", "strategy: while_on_treatment",
     "estimands[primary].intercurrent_events[treatment_discontinuation].strategy", "not supported yet"),
    ("strategy: hypothetical", "strategy: composite",
     "estimands[primary].intercurrent_events[treatment_discontinuation].strategy", "composite_value"),
    ("analysed: change", "analysed: change\n    exposure: EXPWK", "endpoints[fbs_change].exposure",
     "'exposure' is only for count endpoints"),
])
def test_rules_across_fields_point_at_the_field(base_text, write_plan, old, new, field, fragment):
    text = replace_once(base_text, old, new)
    problems, rendered = problems_of(write_plan(text))
    assert [p.field for p in problems] == [field], rendered
    assert fragment in problems[0].message
    assert problems[0].line is not None and problems[0].column is not None


MULTIPLICITY = ("seed: 7\nmultiplicity:\n  method: graphical\n  hypotheses:\n"
                "    - {id: high, analysis: mmrm_primary, arm: Lorvatide 20 mg, visit: Week 12}\n"
                "    - {id: low, analysis: mmrm_primary, arm: Lorvatide 10 mg, visit: Week 12}\n"
                "  transitions: [[0, 1], [1, 0]]\n")


@pytest.mark.parametrize("old, new, field, fragment", [
    ("seed: 7", MULTIPLICITY.replace("arm: Lorvatide 10 mg", "arm: Placebo"), "multiplicity.hypotheses[low].arm",
     "not a non-reference arm"),
    ("seed: 7", MULTIPLICITY.replace("analysis: mmrm_primary, arm: Lorvatide 10", "analysis: mmrm_main, arm: Lorvatide 10"),
     "multiplicity.hypotheses[low].analysis", "not declared"),
    ("seed: 7", MULTIPLICITY.replace("[[0, 1], [1, 0]]", "[[0, 1]]"), "multiplicity.transitions", "square matrix"),
    ("seed: 7", MULTIPLICITY.replace("[[0, 1], [1, 0]]", "[[0, 1], [0.5, 0.5]]"), "multiplicity.transitions[1]",
     "0 on the diagonal"),
    ("visits: primary", "visits: [Week 12, Week 14]",
     "endpoints[fbs_change].analyses.sensitivity[ancova_observed].options.visits[1]", "not a scheduled visit"),
    ("          method: ancova\n          estimand: primary\n", "          method: ancova\n",
     "endpoints[fbs_change].analyses.sensitivity[ancova_observed]", "neither an estimand nor a population"),
    ("        - id: ancova_observed", "        - id: mmrm_primary",
     "endpoints[fbs_change].analyses.sensitivity[mmrm_primary].id", "used twice"),
    ("  - id: full_analysis\n    label: Full analysis set\n    flag: FASFL\n",
     "  - id: full_analysis\n    label: Full analysis set\n    flag: FASFL\n  - id: full_analysis\n    label: Again\n",
     "populations[full_analysis].id", "used twice"),
    ("{label: Week 2, order: 1, day: 15, window: 4}", "{label: Week 2, order: 1, day: 15}",
     "visits.schedule[Week 2]", "windowing needs a planned 'window'"),
    ("{label: Week 8, order: 3, day: 57", "{label: Week 8, order: 3, day: 20", "visits.schedule[Week 8].day",
     "planned days must increase"),
])
def test_more_rules_point_at_the_field(base_text, write_plan, old, new, field, fragment):
    problems, rendered = problems_of(write_plan(replace_once(base_text, old, new)))
    assert [p.field for p in problems] == [field], rendered
    assert fragment in problems[0].message and problems[0].line is not None


def test_imputation_shifts_need_one_value_per_visit_and_known_arms(base_text, write_plan):
    analysis = ("        - id: mi_shifted\n          label: Shifted imputation\n"
                "          method: multiple_imputation\n          estimand: primary\n"
                "          options: {delta: [1, 2], delta_arms: [Lorvatide 30 mg]}\n")
    problems, rendered = problems_of(write_plan(base_text.replace("seed: 7", "").rstrip("\n") + "\n" + analysis))
    assert [(p.field, p.code) for p in problems] == [
        ("endpoints[fbs_change].analyses.sensitivity[mi_shifted].options.delta", "plan.delta_length"),
        ("endpoints[fbs_change].analyses.sensitivity[mi_shifted].options.delta_arms[0]", "plan.unknown_arm"),
    ], rendered
    assert problems[0].expected == "4 values" and problems[1].hint.startswith("did you mean 'Lorvatide")


def test_every_cross_reference_mistake_at_once(base_text, write_plan):
    text = replace_once(base_text, "population: full_analysis", "population: everyone")
    text = replace_once(text, "primary_visit: Week 12", "primary_visit: Week 13")
    text = replace_once(text, "{event: treatment_discontinuation", "{event: stopping")
    problems, rendered = problems_of(write_plan(text))
    assert len(problems) == 3, rendered
    assert [p.line for p in problems] == [line_of(text, "everyone"), line_of(text, "stopping"),
                                          line_of(text, "Week 13")]


def test_a_shape_mistake_does_not_hide_cross_reference_mistakes(base_text, write_plan):
    # The arms section fails its own check, yet the estimand's and the endpoint's broken
    # references (which do not depend on the arms) are reported in the same pass.
    text = replace_once(base_text, "reference: Placebo", "reference: Placbo")
    text = replace_once(text, "population: full_analysis", "population: everyone")
    text = replace_once(text, "primary_visit: Week 12", "primary_visit: Week 13")
    problems, rendered = problems_of(write_plan(text))
    assert [p.field for p in problems] == ["arms.reference", "estimands[primary].population",
                                           "endpoints[fbs_change].primary_visit"], rendered


def test_a_failed_item_is_not_taken_for_a_missing_declaration(base_text, write_plan):
    # The population is declared but has a mistake of its own: the estimand that names it
    # must not also be told the population is undeclared.
    text = replace_once(base_text, "flag: FASFL", "flag: FASFL\n    colour: blue")
    problems, rendered = problems_of(write_plan(text))
    assert [p.field for p in problems] == ["populations[full_analysis].colour"], rendered


# --------------------------------------------------------------------------- broken files
def test_duplicate_keys_are_refused(base_text, write_plan):
    text = replace_once(base_text, "seed: 7", "seed: 7\nseed: 8")
    problems, _ = problems_of(write_plan(text))
    assert [(p.code, p.line, p.column) for p in problems] == [("plan.duplicate_key", line_of(text, "seed: 8"), 1)]
    assert problems[0].field == "seed"
    assert f"line {line_of(text, 'seed: 7')}" in problems[0].expected


def test_duplicate_keys_inside_items_are_named_by_id(base_text, write_plan):
    text = replace_once(base_text, "decimals: 0", "decimals: 0\n    decimals: 1")
    problems, _ = problems_of(write_plan(text))
    assert [p.field for p in problems] == ["endpoints[fbs_change].decimals"]
    assert f"line {line_of(text, 'decimals: 0')}" in problems[0].expected


def test_syntax_error_is_located(base_text, write_plan):
    text = replace_once(base_text, "  title: Bad-input", "  title: [Bad-input")
    problems, _ = problems_of(write_plan(text))
    assert len(problems) == 1 and problems[0].code == "plan.yaml_syntax"
    assert problems[0].line is not None and problems[0].line >= line_of(text, "[Bad-input")


def test_tabs_get_a_hint(base_text, write_plan):
    text = replace_once(base_text, "  phase:", "\tphase:")
    problems, _ = problems_of(write_plan(text))
    assert problems[0].line == line_of(text, "\tphase")
    assert "tab" in problems[0].hint


@pytest.mark.parametrize("text, code", [("", "plan.empty"), ("# only a comment\n", "plan.empty"),
                                        ("- a\n- b\n", "plan.not_a_mapping"), ("just words\n", "plan.not_a_mapping"),
                                        ("a: 1\n---\nb: 2\n", "plan.yaml_syntax")])
def test_files_that_are_not_a_plan(write_plan, text, code):
    problems, _ = problems_of(write_plan(text))
    assert [p.code for p in problems] == [code]


def test_not_utf8(write_plan, tmp_path):
    path = tmp_path / "latin1.yaml"
    path.write_bytes("study:\n  title: caf\u00e9\n".encode("latin-1"))
    problems, _ = problems_of(path)
    assert [(p.code, p.line, p.column) for p in problems] == [("plan.encoding", 2, 13)]


def test_unreadable_file(tmp_path):
    problems, _ = problems_of(tmp_path / "missing.yaml")
    assert problems[0].code == "plan.unreadable"
    problems, _ = problems_of(tmp_path)      # a folder is not a plan file
    assert problems[0].code == "plan.unreadable"


def test_alias_bombs_and_recursion_are_plan_errors(write_plan):
    bomb = "a: &a [x, x, x, x, x, x, x, x, x, x]\n" + "".join(
        f"{chr(98 + i)}: &{chr(98 + i)} [*{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)},"
        f" *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}]\n"
        for i in range(6))
    problems, _ = problems_of(write_plan(bomb))
    assert problems[0].code == "plan.too_large"
    problems, _ = problems_of(write_plan("a: &x\n  b: *x\n"))
    assert "plan.recursive_alias" in [p.code for p in problems]


def test_merge_keys_still_work(base_text, write_plan):
    # YAML merge keys ('<<') are a legitimate way to share options between analyses.
    text = replace_once(base_text, "        options:\n          covariance: [unstructured, ar1]",
                        "        options: &mmrm_options\n          covariance: [unstructured, ar1]")
    text = replace_once(text, "          options:\n            visits: primary",
                        "          options:\n            <<: {visits: primary}")
    assert load_plan(write_plan(text)).plan == load_plan(BASE_PLAN).plan


# --------------------------------------------------------------------------- issue 10: size, depth, tags
def test_a_long_flat_list_is_called_too_long_not_too_deep(write_plan, monkeypatch):
    from trialcut.plan import load

    monkeypatch.setattr(load, "MAX_NODES", 1_000)      # the rule, not the size, is under test
    problems, text = problems_of(write_plan("study:\n  id: X\nvisits:\n" + "  - 1\n" * 1_001))
    assert [p.code for p in problems] == ["plan.too_large"]
    assert "more than 1,000 values" in text and "nested" not in text


def test_deep_nesting_is_called_too_deep(write_plan):
    problems, text = problems_of(write_plan("a: " + "[" * 5000 + "]" * 5000 + "\n"))
    assert [p.code for p in problems] == ["plan.too_deep"]
    assert "nested too deeply" in text


def test_a_file_far_larger_than_a_plan_is_refused_before_parsing(write_plan):
    from trialcut.plan.load import MAX_PLAN_BYTES

    path = write_plan("# " + "x" * MAX_PLAN_BYTES + "\n")
    problems, text = problems_of(path)
    assert [p.code for p in problems] == ["plan.too_large"]
    assert "larger than a plan can be" in text and f"at most {MAX_PLAN_BYTES // 1024} kB" in text


@pytest.mark.parametrize("tagged, kind", [
    ("study: !custom {id: X}", "mapping"),
    ("study: !!python/object:os.system {id: X}", "mapping"),
    ("visits: !!set {a, b}", "mapping"),
    ("arms: !thing [a, b]", "sequence"),
    ("study: {id: !!binary aGVsbG8=}", "scalar"),
    ("!odd study: {id: X}", "scalar"),
])
def test_every_non_standard_yaml_tag_is_refused(write_plan, tagged, kind):
    problems, text = problems_of(write_plan(tagged + "\n"))
    tag_problems = [p for p in problems if p.code == "plan.yaml_tag"]
    assert tag_problems and tag_problems[0].line == 1, text
    assert f"a plain {kind} without a '!' tag" in text


def test_standard_explicit_tags_still_load(base_text, write_plan):
    # '!!str' on a value that would read as a number is the standard way to quote it (YAML 1.1).
    text = replace_once(base_text, 'version: "1.0"', "version: !!str 1.0")
    assert load_plan(write_plan(text)).plan == load_plan(BASE_PLAN).plan


# --------------------------------------------------------------------------- issue 10: never exit 3
_YAML_PIECES = st.sampled_from(["study:", "  id: X", "- a", "!!python/object:os.system", "!tag", "&a", "*a",
                                "<<: *a", "{", "[", "]", "}", ": ", "\t", "---", "...", "%YAML 1.1", "\u00e9",
                                "format: 2", "visits:", "  - {label: W, day: 1}", "'", '"', "#", "\n", "  "])


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.one_of(st.binary(max_size=300), st.lists(_YAML_PIECES, max_size=40).map(lambda p: "".join(p).encode())))
def test_check_and_lock_on_any_bytes_never_exit_3(tmp_path_factory, capsys, content):
    from trialcut.cli import main

    path = tmp_path_factory.mktemp("plan") / "plan.yaml"
    path.write_bytes(content)
    for argv in (["check", str(path)], ["lock", str(path), "--by", "tester", "--reason", "fuzz"]):
        capsys.readouterr()
        status = main(argv)
        err = capsys.readouterr().err
        assert status == 2, f"{argv[0]}: exit {status} on {content[:80]!r}: {err}"
        assert str(path) in err and "Traceback" not in err
