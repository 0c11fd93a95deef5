"""A GEE of a binary endpoint whose arm has no responders at a visit falls back, and says so.

Data: the respiratory illness trial (HSAUR `respiratory`, tests/open_data_discrete.py) with
every placebo participant set to non-response at month 2.  Expected: each visit's unadjusted
risk difference with Newcombe's hybrid score interval, recomputed here with statsmodels'
`confint_proportions_2indep(method="newcomb")`.
"""
from __future__ import annotations

import pandas as pd
import pytest
from statsmodels.stats.proportion import confint_proportions_2indep

from tests.open_data_discrete import respiratory_long
from trialcut.data.derive_responder import DiscreteAnalysisData
from trialcut.plan.schema import GEEAnalysis
from trialcut.run.context import RunContext
from trialcut.run.methods import METHODS


def test_separation_falls_back_to_newcombe_per_visit():
    frame = respiratory_long()
    frame.loc[(frame["treatment"] == "placebo") & (frame["month"] == 2), "good"] = 0
    frame["month"] = "Month " + frame["month"].astype(str)
    visits = ("Month 1", "Month 2", "Month 3", "Month 4")
    data = DiscreteAnalysisData(frame=frame, subject="subject", arm="treatment", visit="month", outcome="good",
                                baseline="base_good", visits=visits, visit_days={}, arms=("placebo", "treatment"),
                                reference="placebo", primary_visit="Month 4", population=None, estimand=None,
                                endpoint_type="binary", missing_rule="leave_out")
    analysis = GEEAnalysis(id="main", label="GEE", method="gee")
    result = METHODS["gee"](data, analysis, RunContext(root_seed=1))
    assert result["fit"]["fallback"] == "newcombe_hybrid_score"
    assert "placebo at Month 2 (no responders)" in result["fit"]["notes"][0]
    table = result["tables"]["differences"]
    differences = pd.DataFrame(table["data"], columns=table["columns"]).set_index("visit")
    for visit in visits:
        at_visit = frame[frame["month"] == visit]
        counts = at_visit.groupby("treatment")["good"].agg(["sum", "count"])
        lower, upper = confint_proportions_2indep(counts.loc["treatment", "sum"], counts.loc["treatment", "count"],
                                                  counts.loc["placebo", "sum"], counts.loc["placebo", "count"],
                                                  method="newcomb", compare="diff")
        assert (differences.loc[visit, "lower"], differences.loc[visit, "upper"]) == pytest.approx((lower, upper))
