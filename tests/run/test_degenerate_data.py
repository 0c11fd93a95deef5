"""Property (issue 10, finding 9): on any thinned or flattened version of a valid cut (few
participants, visits missing, a constant outcome, no baseline), preparing and running the plan
either refuses the cut with a DataError (exit 2) or returns results in which every analysis is
'ok' or 'failed' with its reason; nothing else escapes (which would be exit 3).  The command
line itself is exercised on the same kinds of data by the bad-input cases (tests/cases/data_*)."""
from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.errors import DataError
from trialcut.plan.load import load_plan
from trialcut.run.context import RunContext
from trialcut.run.runner import run_plan

CASES = Path(__file__).resolve().parents[1] / "cases"
PLAN = load_plan(CASES / "data_constant_outcome" / "plan.yaml").plan      # MMRM, ANCOVA and imputation
FULL = pd.read_csv(CASES / "_base" / "data.csv", dtype=str, keep_default_na=False)
SUBJECTS = list(FULL["USUBJID"].unique())


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.sampled_from(SUBJECTS), min_size=1, max_size=8, unique=True),
       st.integers(0, 2**32 - 1), st.booleans(), st.booleans())
def test_degenerate_cuts_end_in_a_refusal_or_recorded_failures(participants, seed, flat, no_baseline):
    rng = np.random.default_rng(seed)
    frame = FULL[FULL["USUBJID"].isin(participants)].copy()
    post = frame.index[frame["ABLFL"] != "Y"]
    frame = frame.drop(index=rng.choice(post, rng.integers(0, len(post) + 1), replace=False))
    if flat:
        frame.loc[frame["ABLFL"] != "Y", "AVAL"] = "20"
        frame["CHG"] = ""
    if no_baseline:
        frame["BASE"] = ""
    try:
        cut = prepare_cut(PLAN, raw_from_frame(frame.replace("", None), typed=False))
    except DataError as error:
        assert error.problems
        return
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = run_plan(PLAN, cut, RunContext(root_seed=1), plan_block={}, data_block={}, run_block={})
    for analysis in results["endpoints"][0]["analyses"]:
        assert analysis["status"] in ("ok", "failed"), analysis["id"]
        assert (analysis["status"] == "failed") == bool(analysis["error"]), analysis["id"]
