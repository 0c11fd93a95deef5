"""Subgroup analyses of the primary analysis (trialcut.run.subgroups).

The test of equal effects is checked against the two-group identity: with two independent
estimates it is (theta_1 - theta_2)^2 / (se_1^2 + se_2^2), the square of the usual z test of
a difference between independent estimates (textbook identity).  The run-level checks use the
bad-input cases' base cut and recount participants per level from the CSV by hand.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import stats

from trialcut.cli import main
from trialcut.run.subgroups import _interaction

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


@pytest.mark.parametrize("effect, estimates", [("difference", (-1.6, -6.7)), ("rate_ratio", (0.71, 1.14))])
def test_two_levels_give_the_z_test_of_a_difference(effect, estimates):
    levels = pd.DataFrame({"level": ["a", "b"], "arm": ["X", "X"], "status": ["ok", "ok"],
                           "estimate": estimates, "se": [1.07, 1.21]})
    row = _interaction(levels, effect).iloc[0]
    scale = np.log(estimates) if effect == "rate_ratio" else np.array(estimates)
    z = (scale[0] - scale[1]) / np.hypot(1.07, 1.21)
    assert row["statistic"] == pytest.approx(z ** 2, rel=1e-12)
    assert row["p"] == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-10) and row["num_df"] == 1


def test_levels_are_fitted_or_reported_with_their_counts(tmp_path):
    plan = yaml.safe_load((BASE / "plan.yaml").read_text())
    plan["endpoints"][0]["analyses"]["sensitivity"] = []
    plan["subgroups"] = [{"id": "severity", "label": "Severity", "column": "STRAT1R", "levels": ["Mild", "Severe"],
                          "min_participants": 3},
                         {"id": "sex", "label": "Sex", "column": "SEX", "levels": ["F", "M"],
                          "min_participants": 1000}]
    (tmp_path / "plan.yaml").write_text(yaml.safe_dump(plan, sort_keys=False))
    out = tmp_path / "out"
    assert main(["run", str(tmp_path / "plan.yaml"), "--data", str(BASE / "data.csv"), "--cut", "c1",
                 "--out", str(out), "--unlocked"]) == 0
    results = json.loads(next(out.glob("*/*/*/results.json")).read_text())
    severity, sex = results["endpoints"][0]["subgroups"]
    levels = pd.DataFrame(severity["levels"]["data"], columns=severity["levels"]["columns"])
    data = pd.read_csv(BASE / "data.csv").drop_duplicates("USUBJID").query("FASFL == 'Y'")
    by_hand = data.groupby(["STRAT1R", "TRT01P"]).size()
    for _, row in levels.iterrows():
        assert row["n_arm"] == by_hand[(row["level"], row["arm"])]
        assert row["n_reference"] == by_hand[(row["level"], "Placebo")]
    assert set(levels["status"]) == {"ok"}
    assert len(severity["interaction"]["data"]) == 2
    reported = pd.DataFrame(sex["levels"]["data"], columns=sex["levels"]["columns"])
    assert set(reported["status"]) == {"not_fitted"} and reported["estimate"].isna().all()
    assert "reported, not fitted" in sex["notes"][0] and "exploratory" in sex["caution"]
    # the report shows each factor with its forest plot and the caution
    folder = next(out.glob("*/*/*/results.json")).parent
    html = (folder / "report.html").read_text()
    assert "Subgroups: Severity" in html and "Subgroup results are exploratory" in html
    assert any("subgroup_severity_forest" in p.name for p in (folder / "figures").iterdir())
