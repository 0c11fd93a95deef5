"""Roles and estimand guard-rails of a plan (ICH E9(R1): a sensitivity analysis keeps the primary
estimand and changes only assumptions about missing data; another estimand or population is a
supplementary analysis), and the congeniality of imputation models (Meng 1994)."""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from trialcut.cli import main
from trialcut.plan.estimand_checks import findings, role_of
from trialcut.plan.schema import AnalysisPlan

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"


def _raw() -> dict:
    raw = yaml.safe_load(BASE.read_text(encoding="utf-8"))
    raw["populations"].append({"id": "per_protocol", "label": "Per-protocol set", "flag": "PPROTFL"})
    raw["estimands"].append({**raw["estimands"][0], "id": "treatment_policy", "label": "Treatment policy",
                             "intercurrent_events": [{"event": "treatment_discontinuation",
                                                      "strategy": "treatment_policy"}]})
    return raw


def _with(*sensitivity: dict) -> AnalysisPlan:
    raw = _raw()
    raw["endpoints"][0]["analyses"]["sensitivity"] = list(sensitivity)
    return AnalysisPlan.model_validate(raw)


def _mi(**options) -> dict:
    base = {"id": "mi", "label": "Multiple imputation", "method": "multiple_imputation", "estimand": "primary"}
    return {**base, "options": {"covariates": ["BASE"], "covariate_effects": "common", **options}}


def _codes(plan) -> list[str]:
    return [f.code for f in findings(plan)]


def test_congenial_mar_imputation_of_the_primary_estimand_raises_nothing():
    plan = _with(_mi(assumption="mar"))
    assert _codes(plan) == []
    endpoint = plan.endpoints[0]
    assert role_of(plan, endpoint, endpoint.analyses.sensitivity[0]) == "sensitivity"
    assert role_of(plan, endpoint, endpoint.analyses.primary) == "primary"


def test_sensitivity_analysis_in_another_population_is_flagged_and_reported_supplementary():
    ancova = {"id": "pp", "label": "Per protocol", "method": "ancova", "estimand": "primary",
              "population": "per_protocol"}
    plan = _with(ancova)
    assert _codes(plan) == ["estimand.sensitivity_population"]
    assert role_of(plan, plan.endpoints[0], plan.endpoints[0].analyses.sensitivity[0]) == "supplementary"
    declared = _with({**ancova, "role": "sensitivity"})
    assert "declared a sensitivity analysis" in findings(declared)[0].message
    assert _codes(_with({**ancova, "role": "supplementary"})) == []


def test_reference_based_imputation_under_a_hypothetical_strategy_is_flagged():
    plan = _with(_mi(assumption="jump_to_reference"))
    assert _codes(plan) == ["estimand.strategy_conflict"]
    assert "hypothetical" in findings(plan)[0].message
    # The same imputation for the treatment-policy estimand, declared supplementary, is in order.
    assert _codes(_with(_mi(assumption="jump_to_reference") | {"estimand": "treatment_policy",
                                                                "role": "supplementary"})) == []


def test_assumption_rules_are_judged_event_by_event():
    rules = [{"event": "treatment_discontinuation", "reasons": ["Adverse event"], "assumption": "copy_reference"}]
    plan = _with(_mi(assumption="mar", reason_column="DCTREAS", assumptions_by_reason=rules))
    assert _codes(plan) == ["estimand.strategy_conflict"]


@pytest.mark.parametrize("options,code", [
    ({"covariates": []}, "estimand.imputation_fewer_covariates"),
    ({"covariate_effects": "by_visit"}, "estimand.imputation_structure"),
])
def test_imputation_model_not_congenial_with_the_primary_is_flagged(options, code):
    plan = _with(_mi(assumption="mar", **options))
    assert _codes(plan) == [code]
    assert "BASE" in findings(plan)[0].message


def test_primary_with_covariates_by_visit_wants_them_by_visit():
    raw = _raw()
    raw["endpoints"][0]["analyses"]["primary"]["options"]["covariates_by_visit"] = ["BASE"]
    raw["endpoints"][0]["analyses"]["sensitivity"] = [_mi(assumption="mar")]
    plan = AnalysisPlan.model_validate(raw)
    assert _codes(plan) == ["estimand.imputation_structure"]
    raw["endpoints"][0]["analyses"]["sensitivity"] = [_mi(assumption="mar", covariate_effects="by_visit")]
    assert _codes(AnalysisPlan.model_validate(raw)) == []


def test_check_prints_each_warning_with_its_line(tmp_path, capsys):
    raw = _raw()
    raw["endpoints"][0]["analyses"]["sensitivity"] = [_mi(assumption="jump_to_reference")]
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "warning" in out and "hypothetical strategy" in out
    assert f"{path}:" in out and "sensitivity[mi].options.assumption" in out


def test_a_role_must_fit_its_slot():
    raw = _raw()
    raw["endpoints"][0]["analyses"]["sensitivity"] = [_mi(assumption="mar") | {"role": "primary"}]
    with pytest.raises(Exception, match="does not fit"):
        AnalysisPlan.model_validate(raw)
