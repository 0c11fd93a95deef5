"""Plan rules for binary and count endpoints and their analysis methods (issue 12)."""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml

from trialcut.errors import PlanError
from trialcut.plan.load import load_plan
from trialcut.plan.schema import ANALYSIS_METHODS, METHOD_ENDPOINT_TYPES
from trialcut.run.methods import METHODS

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"


def _plan_with(tmp_path, endpoint: dict) -> Path:
    plan = yaml.safe_load(BASE.read_text())
    plan["endpoints"] = [endpoint]
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(plan, sort_keys=False))
    return path


def _binary(response, method="gee", options=None):
    return {"id": "responder", "label": "Responder", "type": "binary", "parameter": "FBS", "analysed": "change",
            "primary_visit": "Week 12", "response": response,
            "analyses": {"primary": {"id": "main", "label": "Main", "method": method, "estimand": "primary",
                                     "options": options or {}}}}


def test_every_method_has_endpoint_types_and_a_runner():
    assert set(METHOD_ENDPOINT_TYPES) == set(ANALYSIS_METHODS) == set(METHODS)


def test_a_threshold_response_loads(tmp_path):
    loaded = load_plan(_plan_with(tmp_path, _binary({"threshold": -5, "direction": "at_most",
                                                     "missing": "non_response"})))
    endpoint = loaded.plan.endpoints[0]
    assert endpoint.response.threshold == -5 and endpoint.analyses.primary.options.correlation == "exchangeable"


@pytest.mark.parametrize("response, fragment", [
    ({"threshold": -5, "missing": "non_response"}, "a threshold needs its direction"),
    ({"threshold": -5, "direction": "at_most", "flag_column": "RESPFL", "missing": "leave_out"}, "exactly one"),
    ({"flag_column": "RESPFL"}, "missing"),
    ({"threshold": -5, "direction": "at_most", "flag_values": ["R", "N"], "missing": "leave_out"},
     "flag_values name the values of flag_column"),
    ({"flag_column": "RESPFL", "flag_values": ["R", "R"], "missing": "leave_out"}, "two different values"),
])
def test_response_rules_are_checked_with_their_place(tmp_path, response, fragment):
    with pytest.raises(PlanError) as caught:
        load_plan(_plan_with(tmp_path, _binary(response)))
    text = caught.value.render()
    assert fragment in text and "endpoints[responder].response" in text


def test_a_count_method_on_a_binary_endpoint_is_refused(tmp_path):
    with pytest.raises(PlanError) as caught:
        load_plan(_plan_with(tmp_path, _binary({"flag_column": "RESPFL", "missing": "leave_out"}, method="rate")))
    assert "method 'rate' does not analyse binary endpoints" in caught.value.render()


def test_a_count_endpoint_needs_the_counts_themselves(tmp_path):
    endpoint = {"id": "episodes", "label": "Episodes", "type": "count", "parameter": "FBS", "analysed": "change",
                "primary_visit": "Week 12", "exposure": "EXPWK",
                "analyses": {"primary": {"id": "main", "label": "Main", "method": "rate", "estimand": "primary"}}}
    with pytest.raises(PlanError) as caught:
        load_plan(_plan_with(tmp_path, endpoint))
    assert "endpoints[episodes].analysed: a count endpoint analyses the counts themselves" in caught.value.render()


def test_imputing_the_score_needs_a_threshold_response(tmp_path):
    endpoint = _binary({"flag_column": "RESPFL", "missing": "leave_out"}, method="responder_imputation")
    with pytest.raises(PlanError) as caught:
        load_plan(_plan_with(tmp_path, endpoint))
    assert "the response must be derived by a threshold" in caught.value.render()
