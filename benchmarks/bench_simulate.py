"""Time of simulating the demo plan's primary analysis (issue 13): in this process and on Dask.

Trials of the demo scenarios file's ``expected_effect`` scenario (300 participants, 4 visits),
primary analysis only, run by the simulation engine (run/simulate.py) in this process and on a
local Dask cluster of 2 single-threaded workers, in batches of 10.  Figures: wall time for the
trials in this process (target for 1,000 trials: under 2 minutes on 2 cores), the Dask time, and
their ratio (target at most 0.6).  Both runs must give identical outcomes (same seeds).  The
in-process CPU time is printed beside its wall time: on a shared machine the two differ.

``TRIALCUT_BENCH_TRIALS`` sets the number of trials (default 200, about 0.08 s of CPU per trial
in this process, so some 15 s on a quiet 2-core machine; 1000 for the issue's figure); any other
count is scaled linearly to 1,000 trials and labelled as such.
"""
from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def run() -> list[dict]:
    from trialcut.plan.load import load_plan
    from trialcut.plan.scenarios_load import load_scenarios
    from trialcut.run.context import InlineExecutor
    from trialcut.run.executor import DaskExecutor
    from trialcut.run.simulate import batches, simulate

    trials = int(os.environ.get("TRIALCUT_BENCH_TRIALS", "200"))
    plan = load_plan(ROOT / "analysis_plans" / "demo.yaml").plan
    file = load_scenarios(ROOT / "analysis_plans" / "demo_scenarios.yaml", plan).scenarios
    chosen = [s.model_copy(update={"analyses": ()}) for s in file.scenarios if s.id == "expected_effect"]
    scenarios = file.model_copy(update={"scenarios": tuple(chosen)})
    work = batches(plan, scenarios, trials, 20261202, batch_size=10)
    with tempfile.TemporaryDirectory() as scratch:
        started, cpu_started = time.perf_counter(), time.process_time()
        inline = simulate(work, InlineExecutor(), work_folder=Path(scratch) / "inline")
        inline_seconds = time.perf_counter() - started
        inline_cpu = time.process_time() - cpu_started
        with DaskExecutor(n_workers=2) as dask:
            dask.preload("trialcut.run.simulate", "trialcut.stats.mmrm")
            started = time.perf_counter()
            distributed = simulate(work, dask, work_folder=Path(scratch) / "dask", round_size=len(work))
            dask_seconds = time.perf_counter() - started
    per_thousand = inline_seconds * 1000 / trials
    ratio = dask_seconds / inline_seconds
    label = "" if trials == 1000 else f" (measured on {trials}, scaled linearly)"
    return [
        {"figure": f"simulate 1,000 trials of the demo primary analysis in this process{label}",
         "value": round(per_thousand, 1), "unit": "s", "target": "< 120", "passed": per_thousand < 120,
         # CPU time beside wall time: on a shared machine the wall time carries the others' load.
         "detail": f"{trials} trials in {inline_seconds:.1f} s ({inline_cpu:.1f} s of CPU, "
                   f"{inline_cpu / trials:.3f} s per trial)"},
        {"figure": "simulate on 2 Dask workers / in this process", "value": round(ratio, 2), "unit": "ratio",
         "target": "<= 0.6", "passed": ratio <= 0.6,
         "detail": f"Dask {dask_seconds:.1f} s; outcomes identical: {inline == distributed}"},
    ]


if __name__ == "__main__":
    for row in run():
        print(row)
