"""Same plan, data and seed give the same numbers whatever the executor (issue 4).

Runs the demo plan's analyses (imputation and tipping point included, with fewer
imputations to stay quick) through the runner in-process, on a 2-process pool and on a
2-worker Dask LocalCluster, and asks for identical results.  The data come from the demo
simulator: this is a check of mechanics (determinism), not of statistical correctness.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.data.simulate import simulate_trial
from trialcut.plan.load import load_plan
from trialcut.run.context import RunContext
from trialcut.run.runner import run_plan

DEMO_PLAN = Path(__file__).resolve().parents[2] / "analysis_plans" / "demo.yaml"


def _quick_plan():
    plan = load_plan(DEMO_PLAN).plan
    endpoint = plan.endpoints[0]
    sensitivity = tuple(
        a.model_copy(update={"options": a.options.model_copy(update={"imputations": 8, "burn_in": 20})})
        if a.method in ("multiple_imputation", "tipping_point") else a
        for a in endpoint.analyses.sensitivity)
    analyses = endpoint.analyses.model_copy(update={"sensitivity": sensitivity})
    return plan.model_copy(update={"endpoints": (endpoint.model_copy(update={"analyses": analyses}),)})


def _results(plan, cut, executor) -> str:
    context = RunContext(root_seed=plan.seed, executor=executor)
    results = run_plan(plan, cut, context, plan_block={}, data_block={}, run_block={})
    return json.dumps(results, sort_keys=True)


@pytest.mark.slow
def test_results_identical_for_every_executor():
    from trialcut.run.context import InlineExecutor
    from trialcut.run.executor import DaskExecutor, ProcessPoolExecutor

    plan = _quick_plan()
    cut = prepare_cut(plan, raw_from_frame(simulate_trial(seed=11, n_participants=90), "simulated.csv"))
    inline = _results(plan, cut, InlineExecutor())
    assert '"multiple_imputation"' in inline and '"tipping_point"' in inline
    with ProcessPoolExecutor(workers=2) as pool:
        assert _results(plan, cut, pool) == inline
    with DaskExecutor(n_workers=2) as cluster:
        assert _results(plan, cut, cluster) == inline
