"""Timing of multiple imputation and of the tipping-point grid, in-process and on Dask.

Data (invented here, fixed seed): two arms of 300 participants, six visits, a baseline
covariate, 35% of participants leave at a random visit after the first (an intercurrent
event from then on) and 3% of the other values are missing intermittently.

Figures:
(a) 500 imputations under jump to reference (burn-in 200, thinning 10, 4 chains), ANCOVA
    at every visit (the last one is the one reported): seconds in this process;
(b) the same run on a 2-worker Dask LocalCluster: seconds, and the ratio to (a); the pooled
    results must be identical to (a).  Not timed: starting the cluster and importing the
    imputation modules on the workers (``DaskExecutor.preload``), both paid once per cluster.
    The detail gives the CPU seconds the workers spent beside those of (a): about equal when
    a worker computes as fast as this process, whatever else runs on the machine;
(c) a 10 × 10 two-dimensional tipping grid (active and reference shifts) with 100
    imputations, on the 2 Dask workers: seconds;
(d) how much parallel capacity the machine has right now: the time of two equal chains run
    at once on the 2 workers over the time of one alone (1.0 when two cores are free; on a
    shared machine it explains a ratio (b) far from 0.5: each worker runs half the chains,
    so (b) cannot be below about half of (d)).  The detail also gives the same chain in this
    process: a worker must run it as fast, or every chain pays for the difference (it ran
    1.5 times as long when Dask's MALLOC_TRIM_THRESHOLD_=65536 reached the workers).
"""
from __future__ import annotations

import os
import time

import numpy as np
import pandas as pd

SEED = 20261202
VISITS = tuple(f"Week {w}" for w in (2, 4, 8, 12, 16, 24))
ARMS = ("Placebo", "Active")
N_PER_ARM = 300


def simulate(seed: int = SEED) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t = len(VISITS)
    lags = np.abs(np.subtract.outer(np.arange(t), np.arange(t)))
    sigma = 25.0 * 0.7**lags
    rows = []
    for k, arm in enumerate(ARMS):
        baseline = rng.normal(24.0, 5.0, N_PER_ARM)
        means = -np.linspace(1.0, 5.0, t) - k * np.linspace(0.5, 3.0, t)
        values = means + 0.3 * (baseline - 24.0)[:, None] + rng.multivariate_normal(np.zeros(t), sigma, N_PER_ARM)
        leave = np.where(rng.random(N_PER_ARM) < 0.35, rng.integers(1, t, N_PER_ARM), t)
        gaps = rng.random((N_PER_ARM, t)) < 0.03
        for i in range(N_PER_ARM):
            for j, visit in enumerate(VISITS):
                after = j >= leave[i]
                missing = after or (gaps[i, j] and j > 0)
                rows.append((f"{arm[0]}{i:04d}", arm, visit, baseline[i], np.nan if missing else values[i, j], after))
    return pd.DataFrame(rows, columns=["USUBJID", "TRT01P", "AVISIT", "BASE", "CHG", "event"])


def _impute(frame, executor):
    from trialcut.stats.imputation import impute

    return impute(frame, subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="CHG", visits=VISITS,
                  reference="Placebo", covariates=("BASE",), assumption="jump_to_reference", event="event",
                  n_imputations=500, burn_in=200, thinning=10, chains=4,
                  seed_sequence=np.random.SeedSequence(SEED), executor=executor)


def _tipping(frame, executor):
    from trialcut.stats.tipping import tipping_point

    return tipping_point(frame, subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="CHG", visits=VISITS,
                         reference="Placebo", target_visit=VISITS[-1], shifts=np.linspace(0.0, 9.0, 10),
                         reference_shifts=np.linspace(-4.5, 4.5, 10), covariates=("BASE",), event="event",
                         assumption="mar", n_imputations=100, burn_in=200, thinning=10, chains=4,
                         seed_sequence=np.random.SeedSequence(SEED), executor=executor)


def _cpu_seconds(times) -> float:
    return times.user + times.system


def _timed(function, *args):
    start = time.perf_counter()
    value = function(*args)
    return value, time.perf_counter() - start


def _capacity(frame, executor) -> dict:
    from trialcut.stats.imputation import ChainTask, prepare_data, run_chain

    data = prepare_data(frame, subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="CHG", visits=VISITS,
                        reference="Placebo", covariates=("BASE",), event="event")
    seeds = np.random.SeedSequence(SEED).spawn(2 * 60)
    tasks = [ChainTask(data, "jump_to_reference", False, 200, 10, tuple(seeds[60 * c:60 * (c + 1)]),
                       np.zeros((1, len(ARMS), len(VISITS))), False) for c in range(2)]
    _, here = _timed(run_chain, tasks[0])
    _, alone = _timed(executor.map, run_chain, tasks[:1])
    _, together = _timed(executor.map, run_chain, tasks)
    ratio = together / alone
    return {"figure": "two chains at once / one chain, 2 Dask workers", "value": round(ratio, 2), "unit": "ratio",
            "target": "~1 (two free cores)", "passed": ratio <= 1.25,
            "detail": f"one chain {alone:.2f} s on a worker ({here:.2f} s in this process), two at once "
                      f"{together:.2f} s; ratio (b) can reach about {ratio / 2:.2f} now"}


def run() -> list[dict]:
    from trialcut.run.executor import DaskExecutor

    frame = simulate()
    before = _cpu_seconds(os.times())
    inline, inline_seconds = _timed(_impute, frame, None)
    inline_cpu = _cpu_seconds(os.times()) - before
    last = inline.differences().iloc[-1]
    rows = [{"figure": "imputation 600x6, 500 imputations, J2R, in-process", "value": round(inline_seconds, 2),
             "unit": "s", "target": "< 20", "passed": inline_seconds < 20,
             "detail": f"estimate at {last['visit']}: {last['estimate']:.4f} (se {last['se']:.4f})"}]
    with DaskExecutor() as executor:
        _, startup = _timed(executor.preload, "trialcut.stats.imputation", "trialcut.stats.tipping")
        before = executor.on_workers(os.times)
        distributed, dask_seconds = _timed(_impute, frame, executor)
        after = executor.on_workers(os.times)
        worker_cpu = sum(_cpu_seconds(after[w]) - _cpu_seconds(before[w]) for w in after)
        ratio = dask_seconds / inline_seconds
        same = distributed.to_dict() == inline.to_dict()
        rows.append({"figure": "same run on 2 Dask workers / in-process", "value": round(ratio, 3), "unit": "ratio",
                     "target": "<= 0.6", "passed": ratio <= 0.6 and same,
                     "detail": f"{dask_seconds:.2f} s on Dask (cluster start and imports {startup:.2f} s not counted); "
                               f"CPU {worker_cpu:.2f} s on the workers, {inline_cpu:.2f} s in-process; "
                               f"results identical: {same}"})
        rows.append(_capacity(frame, executor))
        grid, grid_seconds = _timed(_tipping, frame, executor)
        point = grid.points[len(grid.points) // 2]
        rows.append({"figure": "tipping grid 10x10, 100 imputations, 2 Dask workers", "value": round(grid_seconds, 2),
                     "unit": "s", "target": "< 60", "passed": grid_seconds < 60,
                     "detail": f"reference shift {point.reference_shift:g}: {point.statement}"})
    return rows


if __name__ == "__main__":
    for row in run():
        print(row)
