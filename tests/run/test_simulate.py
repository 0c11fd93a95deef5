"""The simulation engine: results depend on the seed and the trial indices only, never on where
or in how many batches the trials ran; an interrupted simulation resumes from the batches done."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import yaml

from trialcut.plan.load import load_plan
from trialcut.plan.scenarios_load import load_scenarios
from trialcut.run.context import InlineExecutor
from trialcut.run.executor import ProcessPoolExecutor
from trialcut.run.simulate import batches, simulate, summarise, trial_seed

PLAN = Path(__file__).resolve().parent / "simulation" / "two_arm_plan.yaml"
VISITS = ("Visit 1", "Visit 2", "Visit 3", "Visit 4")


def _scenarios(tmp_path: Path, seed: int):
    changes = {v: -1.0 * (i + 1) for i, v in enumerate(VISITS)}
    rates = {v: 0.1 for v in VISITS[1:]}
    scenario = {"id": "small", "participants_per_arm": {"Control": 12, "Active": 12},
                "baseline": {"mean": 20, "sd": 5}, "mean_change": {"Control": changes, "Active": changes},
                "sd": {v: 3.0 for v in VISITS}, "correlation": {"autoregressive": 0.5},
                "dropout": {"mechanism": "at_random_last_value", "slope": 1.0, "rates": {"Active": rates}}}
    path = tmp_path / "scenarios.yaml"
    path.write_text(yaml.safe_dump({"format": 1, "seed": seed, "scenarios": [scenario]}, sort_keys=False))
    plan = load_plan(PLAN).plan
    return plan, load_scenarios(path, plan).scenarios


class CountingExecutor(InlineExecutor):
    def __init__(self):
        self.batches = 0

    def map(self, function, items):
        self.batches += len(items)
        return super().map(function, items)


@pytest.mark.parametrize("seed", [3, 4])
def test_same_trials_inline_in_a_process_pool_and_in_other_batches(tmp_path, seed):
    plan, scenarios = _scenarios(tmp_path, seed)
    inline = simulate(batches(plan, scenarios, 6, seed, batch_size=6), InlineExecutor(), work_folder=tmp_path / "a")
    with ProcessPoolExecutor(2) as pool:
        pooled = simulate(batches(plan, scenarios, 6, seed, batch_size=2), pool, work_folder=tmp_path / "b")
    assert inline == pooled, f"seed {seed}"
    estimates = [o["analyses"]["repeated"]["by_arm"]["Active"]["estimate"] for o in inline]
    assert len(set(estimates)) == 6, f"seed {seed}: every trial has its own data"


def test_trial_seeds_are_spawned_from_the_root_seed_and_the_indices():
    # numpy's SeedSequence: a spawn key gives an independent stream; the same key, the same stream.
    first = trial_seed(9, 0, 1).generate_state(4)
    assert np.array_equal(first, trial_seed(9, 0, 1).generate_state(4))
    assert not np.array_equal(first, trial_seed(9, 1, 1).generate_state(4))
    assert not np.array_equal(first, trial_seed(9, 0, 2).generate_state(4))
    assert np.array_equal(first, np.random.SeedSequence(9).spawn(1)[0].spawn(2)[1].generate_state(4))


def test_an_interrupted_simulation_resumes_from_the_batches_done(tmp_path):
    plan, scenarios = _scenarios(tmp_path, 5)
    work = batches(plan, scenarios, 6, 5, batch_size=2)
    first = simulate(work, InlineExecutor(), work_folder=tmp_path / "work")
    (tmp_path / "work" / f"{work[1].name}.json").unlink()                       # as if stopped before it
    (tmp_path / "work" / f"{work[2].name}.json").write_text('[{"trial": 4', encoding="utf-8")  # cut short
    counting = CountingExecutor()
    again = simulate(work, counting, work_folder=tmp_path / "work")
    assert counting.batches == 2
    assert again == first


def test_summary_monte_carlo_errors_follow_their_definitions(tmp_path):
    plan, scenarios = _scenarios(tmp_path, 6)
    outcomes = simulate(batches(plan, scenarios, 8, 6, batch_size=4), InlineExecutor(), work_folder=tmp_path / "w")
    summary = summarise(plan, scenarios, outcomes, trials=8, root_seed=6)
    (row,) = summary["analyses"]
    estimates = np.array([o["analyses"]["repeated"]["by_arm"]["Active"]["estimate"] for o in outcomes])
    # Morris, White & Crowther (2019), Table 6: bias and its MC SE, empirical SE and its MC SE.
    assert row["bias"] == pytest.approx(estimates.mean() - 0.0)
    assert row["bias_mc_se"] == pytest.approx(estimates.std(ddof=1) / np.sqrt(8))
    assert row["empirical_se_mc_se"] == pytest.approx(estimates.std(ddof=1) / np.sqrt(2 * 7))
    coverage = row["coverage"]
    assert row["coverage_mc_se"] == pytest.approx(np.sqrt(coverage * (1 - coverage) / 8))


def test_same_trials_on_a_dask_cluster(tmp_path):
    pytest.importorskip("distributed")
    from trialcut.run.executor import DaskExecutor

    plan, scenarios = _scenarios(tmp_path, 8)
    inline = simulate(batches(plan, scenarios, 4, 8, batch_size=4), InlineExecutor(), work_folder=tmp_path / "a")
    with DaskExecutor(n_workers=2) as cluster:
        distributed = simulate(batches(plan, scenarios, 4, 8, batch_size=1), cluster, work_folder=tmp_path / "b")
    assert inline == distributed


class ReportingExecutor(InlineExecutor):
    """Says each finished batch, as the process pool and Dask executors do."""

    reports_progress = True

    def map(self, function, items, progress=None):
        results = []
        for done, item in enumerate(items, start=1):
            results.append(function(item))
            if progress:
                progress(done, len(items))
        return results


def test_progress_says_each_count_once_and_ends_once(tmp_path):
    # A batch log read "6 of 6 started" and "done in 0.0 s" after the real end: the round's
    # last batch and the round's end both said the total (common practice: one line per change).
    import io

    from trialcut.commands_progress import _log_reporter

    plan, scenarios = _scenarios(tmp_path, 6)
    said, log = [], io.StringIO()
    reporter = _log_reporter(log)

    def progress(label, done, total):
        said.append(done)
        reporter(label, done, total)

    simulate(batches(plan, scenarios, 6, 6, batch_size=2), ReportingExecutor(), work_folder=tmp_path / "w",
             progress=progress, round_size=2)
    assert said == [0, 2, 4, 6]
    assert log.getvalue().count("started") == 1 and log.getvalue().count("6 of 6 done") == 1, log.getvalue()
