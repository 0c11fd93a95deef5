"""Binary and count endpoints through the whole run (plan, data checks, derivation, methods).

The data are the bad-input cases' base cut (tests/cases/_base/data.csv).  Expected values are
recomputed here from the CSV by plain pandas (responders counted by hand) and by calling the
statistics layer directly, so the test checks the derivation and the plumbing, not the fits
(those are checked against statsmodels under tests/external/).
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from trialcut.cli import main

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


def _run(tmp_path, endpoints, estimands=None) -> dict:
    plan = yaml.safe_load((BASE / "plan.yaml").read_text())
    plan["endpoints"] = endpoints
    plan["estimands"] += estimands or []
    (tmp_path / "plan.yaml").write_text(yaml.safe_dump(plan, sort_keys=False))
    data = pd.read_csv(BASE / "data.csv")
    data["EXPWK"] = np.where(data["ABLFL"] == "Y", np.nan, 2.0)
    data.to_csv(tmp_path / "data.csv", index=False)
    out = tmp_path / "out"
    assert main(["run", str(tmp_path / "plan.yaml"), "--data", str(tmp_path / "data.csv"), "--cut", "c1",
                 "--out", str(out), "--unlocked"]) == 0
    folder = next(p for p in out.glob("*/*/*") if (p / "results.json").exists())
    return json.loads((folder / "results.json").read_text())


def _table(analysis, name) -> pd.DataFrame:
    return pd.DataFrame(analysis["tables"][name]["data"], columns=analysis["tables"][name]["columns"])


COMPOSITE = [{"id": "responder", "label": "Responder estimand", "population": "full_analysis",
              "treatment": "Lorvatide versus placebo", "summary": "difference in responders",
              "intercurrent_events": [{"event": "treatment_discontinuation", "strategy": "composite",
                                       "composite_value": 60}]}]


def test_threshold_responders_with_composite_events_and_missing_as_non_response(tmp_path):
    endpoint = {"id": "responder", "label": "Responder", "type": "binary", "parameter": "FBS", "analysed": "change",
                "primary_visit": "Week 12",
                "response": {"threshold": -4, "direction": "at_most", "missing": "non_response"},
                "analyses": {"primary": {"id": "gee_main", "label": "GEE", "method": "gee", "estimand": "responder"},
                             "sensitivity": [{"id": "at_week_12", "label": "Week 12", "method": "proportions",
                                              "estimand": "responder", "options": {"strata": ["STRAT1R"]}},
                                             {"id": "imputed", "label": "MI", "method": "responder_imputation",
                                              "estimand": "responder",
                                              "options": {"imputations": 5, "burn_in": 20, "thinning": 2,
                                                          "chains": 1, "covariates": ["BASE"]}}]}}
    results = _run(tmp_path, [endpoint], COMPOSITE)
    gee, proportions, imputed = results["endpoints"][0]["analyses"]
    assert gee["status"] == "ok" and proportions["status"] == "ok", (gee["error"], proportions["error"])
    assert imputed["status"] == "ok", imputed["error"]
    pooled = _table(imputed, "differences")
    assert set(pooled["visit"]) == {"Week 2", "Week 4", "Week 8", "Week 12"} and pooled["df"].notna().all()
    # by hand: a Week 12 response is a change <= -4 recorded before any discontinuation
    data = pd.read_csv(BASE / "data.csv")
    week12 = data[(data["AVISIT"] == "Week 12") & (data["FASFL"] == "Y")]
    stopped = week12["DISCDY"].notna() & (week12["DISCDY"] <= week12["ADY"])
    expected = (week12.assign(r=(week12["CHG"] <= -4) & ~stopped).groupby("TRT01P")["r"].sum())
    observed = _table(gee, "observed_rates").query("visit == 'Week 12'").set_index("arm")["responders"]
    for arm, count in expected.items():
        assert observed[arm] == count
    differences = _table(gee, "differences")
    assert list(differences.columns[:10]) == ["arm", "reference", "visit", "estimate", "se", "df", "t", "p",
                                              "lower", "upper"]
    assert set(differences["visit"]) == {"Week 2", "Week 4", "Week 8", "Week 12"}
    assert gee["fit"]["missing_rule"] == "non_response"
    assert set(_table(proportions, "methods")["method"]) >= {"unadjusted", "mantel_haenszel"}


def test_count_endpoint_rate_and_gee(tmp_path):
    endpoint = {"id": "episodes", "label": "Score read as a count", "type": "count", "parameter": "FBS",
                "analysed": "value", "primary_visit": "Week 12", "exposure": "EXPWK",
                "analyses": {"primary": {"id": "rate_main", "label": "Rate", "method": "rate", "estimand": "primary"},
                             "sensitivity": [{"id": "gee_counts", "label": "GEE", "method": "gee",
                                              "estimand": "primary", "options": {"correlation": "exchangeable"}}]}}
    results = _run(tmp_path, [endpoint])
    rate, gee = results["endpoints"][0]["analyses"]
    assert rate["status"] == "ok" and gee["status"] == "ok", (rate["error"], gee["error"])
    summary = _table(rate, "summary").set_index("arm")
    # the per-participant totals the rate model uses add up to the per-visit table, and every
    # analysed value carries its 2 weeks of exposure (windowing decides which records are analysed)
    per_visit = _table(rate, "observed_rates").groupby("arm")[["events", "n"]].sum()
    for arm in summary.index:
        assert summary.loc[arm, "events"] == pytest.approx(per_visit.loc[arm, "events"])
        assert summary.loc[arm, "exposure"] == pytest.approx(2.0 * per_visit.loc[arm, "n"])
    assert summary["events"].sum() > 0
    assert _table(rate, "differences")["effect"].iloc[0] == "rate_ratio"


def test_multiplicity_across_continuous_and_count_endpoints(tmp_path):
    # Holm over a continuous and a count endpoint: the adjusted p-values follow Holm's rule
    # (Holm 1979) applied by hand to the two raw p-values each analysis reports.
    plan = yaml.safe_load((BASE / "plan.yaml").read_text())
    continuous = plan["endpoints"][0]
    continuous["analyses"]["sensitivity"] = []
    count = {"id": "episodes", "label": "Score read as a count", "type": "count", "parameter": "FBS",
             "analysed": "value", "primary_visit": "Week 12", "exposure": "EXPWK",
             "analyses": {"primary": {"id": "rate_main", "label": "Rate", "method": "rate", "estimand": "primary"}}}
    plan["multiplicity"] = {"method": "holm", "alpha": 0.05, "hypotheses": [
        {"id": "score", "analysis": "mmrm_primary", "arm": "Lorvatide 20 mg", "visit": "Week 12"},
        {"id": "events", "analysis": "rate_main", "arm": "Lorvatide 20 mg", "visit": "Week 12"}]}
    (tmp_path / "plan.yaml").write_text(yaml.safe_dump(plan, sort_keys=False))
    data = pd.read_csv(BASE / "data.csv")
    data["EXPWK"] = np.where(data["ABLFL"] == "Y", np.nan, 2.0)
    data.to_csv(tmp_path / "data.csv", index=False)
    out = tmp_path / "out"
    plan_path = tmp_path / "plan.yaml"
    plan_path.write_text(yaml.safe_dump({**plan, "endpoints": [continuous, count]}, sort_keys=False))
    assert main(["run", str(plan_path), "--data", str(tmp_path / "data.csv"), "--cut", "c1", "--out", str(out),
                 "--unlocked"]) == 0
    results = json.loads(next(out.glob("*/*/*/results.json")).read_text())
    hypotheses = pd.DataFrame(results["multiplicity"]["hypotheses"]["data"],
                              columns=results["multiplicity"]["hypotheses"]["columns"]).set_index("id")
    raw = hypotheses["p"].astype(float)
    assert raw.notna().all()
    ordered = raw.sort_values()
    holm = np.maximum.accumulate([min(1.0, p * (len(raw) - i)) for i, p in enumerate(ordered)])
    for (name, _), expected in zip(ordered.items(), holm):
        assert hypotheses.loc[name, "adjusted_p"] == pytest.approx(expected, rel=1e-12)
