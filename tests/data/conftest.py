"""Shared fixtures of the data-layer tests: a plan written here (not the demo plan) so the
tests do not move when the demo plan is edited, and helpers to build small cuts by hand."""
from __future__ import annotations

import copy

import pandas as pd
import pytest

from trialcut.data.readers import raw_from_frame
from trialcut.plan.schema import AnalysisPlan

PLAN = {
    "study": {"id": "TEST-1", "title": "Data layer test study (invented)"},
    "arms": {"reference": "Placebo", "strata": ["STRAT1R"],
             "list": [{"code": "Placebo"}, {"code": "Active"}]},
    "visits": {"baseline": "Baseline", "windowing": True,
               "schedule": [{"label": "Week 2", "order": 1, "day": 15, "window": 4},
                            {"label": "Week 4", "order": 2, "day": 29, "window": 6}]},
    "populations": [{"id": "fas", "label": "Full analysis set", "flag": "FASFL"},
                    {"id": "pp", "label": "Per protocol set", "flag": "PPROTFL"}],
    "intercurrent_events": [{"id": "stop", "label": "Treatment stopped", "day_column": "DISCDY"},
                            {"id": "rescue", "label": "Rescue medication", "day_column": "RESCDY"}],
    "estimands": [
        {"id": "policy", "label": "Treatment policy", "population": "fas", "treatment": "as randomised",
         "summary": "difference in means",
         "intercurrent_events": [{"event": "stop", "strategy": "treatment_policy"},
                                 {"event": "rescue", "strategy": "treatment_policy"}]},
        {"id": "hypo", "label": "Hypothetical", "population": "fas", "treatment": "if no rescue",
         "summary": "difference in means",
         "intercurrent_events": [{"event": "stop", "strategy": "treatment_policy"},
                                 {"event": "rescue", "strategy": "hypothetical"}]},
        {"id": "comp", "label": "Composite", "population": "fas", "treatment": "stop counts as worst",
         "summary": "difference in means",
         "intercurrent_events": [{"event": "stop", "strategy": "composite", "composite_value": 10.0}]},
    ],
    "endpoints": [{"id": "score", "label": "Score change", "parameter": "FBS", "analysed": "change",
                   "primary_visit": "Week 4", "range": [0, 60],
                   "analyses": {"primary": {"id": "main", "label": "MMRM", "method": "mmrm",
                                            "estimand": "policy",
                                            "options": {"covariates": ["BASE", "STRAT1R"]}}}}],
}


def make_plan(**changes) -> AnalysisPlan:
    """The test plan with top-level sections replaced or patched by ``changes``."""
    data = copy.deepcopy(PLAN)
    for key, value in changes.items():
        if isinstance(value, dict) and isinstance(data.get(key), dict):
            data[key] = {**data[key], **value}
        else:
            data[key] = value
    return AnalysisPlan.model_validate(data)


@pytest.fixture
def plan() -> AnalysisPlan:
    return make_plan()


def record(subject, arm, visit, day, value, *, stratum="Mild", fas="Y", pp="Y", disc=None, resc=None,
           baseline_flag=None, reason=None):
    return {"USUBJID": subject, "PARAMCD": "FBS", "TRT01P": arm, "STRAT1R": stratum, "FASFL": fas,
            "PPROTFL": pp, "AVISIT": visit, "ADY": day, "ABLFL": baseline_flag,
            "AVAL": None if value is None else float(value),
            "DISCDY": disc, "RESCDY": resc, "DCSREAS": reason}


def participant(subject, arm, base, week2, week4, **extra):
    """Baseline on day 1, Week 2 on day 15 and Week 4 on day 29 (None skips a visit)."""
    rows = [record(subject, arm, "Baseline", 1, base, baseline_flag="Y", **extra)]
    if week2 is not None:
        rows.append(record(subject, arm, "Week 2", 15, week2, **extra))
    if week4 is not None:
        rows.append(record(subject, arm, "Week 4", 29, week4, **extra))
    return rows


def frame_of(*groups) -> pd.DataFrame:
    return pd.DataFrame([r for g in groups for r in g])


def raw(frame: pd.DataFrame, typed: bool = True):
    return raw_from_frame(frame, name="hand-made.csv", typed=typed)


def appended(frame: pd.DataFrame, rows) -> pd.DataFrame:
    """``frame`` with records (dicts, a list of dicts or a frame) added at the end."""
    extra = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(rows if isinstance(rows, list) else [rows])
    return pd.concat([frame, extra], ignore_index=True)
