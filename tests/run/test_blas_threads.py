"""Every analysis runs with one BLAS thread, so its numbers do not depend on the machine's cores
or OPENBLAS_NUM_THREADS (trialcut.stats.blas_threads; DEVELOPERS.md, "Executors").

The numbers check uses the open Beat the Blues trial (tests/open_data.py), its 100 participants
repeated 60 times under new ids: at 6,000 participants the imputation model's products are
large enough for OpenBLAS to split them between threads.  Measured on the project's 2-core
machine, the tipping-point grid of this test moves in its last bits between one and two threads
when the limit is taken away (a multiple imputation of the same data did not move: its single
shift table keeps the products small); through the analysis methods it must not move at all.  This is a
check of determinism, not of statistical correctness.
"""
from __future__ import annotations

import pandas as pd
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from tests.open_data import BTHEB_VISITS, beat_the_blues_long
from trialcut.data.prepare import AnalysisData
from trialcut.plan.schema import TippingPointAnalysis
from trialcut.run import simulate
from trialcut.run.context import RunContext
from trialcut.run.executor import ProcessPoolExecutor
from trialcut.run.methods import METHODS, _failing_on_numbers

COPIES = 60


def blas_threads(_item=None) -> list[int]:
    """The thread count of every BLAS library loaded in this process (module level: it pickles)."""
    import numpy.linalg  # noqa: F401  - numpy's and scipy's OpenBLAS both loaded
    import scipy.linalg  # noqa: F401

    return sorted({library["num_threads"] for library in threadpool_info() if library["user_api"] == "blas"})


@pytest.fixture(autouse=True)
def two_threads_around():
    """Two BLAS threads outside the analysis, as on any machine with two cores or more."""
    with threadpool_limits(limits=2, user_api="blas"):
        if blas_threads() != [2]:
            pytest.skip("this BLAS will not run two threads here, so the limit cannot be seen")
        yield


def test_every_method_is_dispatched_on_one_thread():
    seen = _failing_on_numbers(lambda data, analysis, context: blas_threads())(None, None, None)
    assert seen == [1]
    assert blas_threads() == [2]      # set back on leaving
    dispatcher = _failing_on_numbers(blas_threads).__code__
    assert all(method.__code__ is dispatcher for method in METHODS.values())


def test_worker_tasks_run_on_one_thread(monkeypatch):
    # A spawned worker starts with the environment's count: two, unless the executor limits it.
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "2")
    with ProcessPoolExecutor(workers=1) as pool:
        assert pool.map(blas_threads, [0, 1]) == [[1], [1]]


def test_simulated_trials_run_on_one_thread(monkeypatch):
    monkeypatch.setattr(simulate, "run_trial", lambda *args: blas_threads())
    batch = simulate.TrialBatch(plan=None, scenario=None, scenario_index=0, root_seed=1, start=0, stop=2)
    assert simulate.run_batch(batch) == [[1], [1]]


@pytest.fixture(scope="module")
def stacked_trial() -> AnalysisData:
    once = beat_the_blues_long()
    frame = pd.concat([once.assign(USUBJID=once["USUBJID"] + f"-{copy}") for copy in range(COPIES)],
                      ignore_index=True)
    return AnalysisData(frame=frame, subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="AVAL",
                        baseline="BASE", visits=BTHEB_VISITS, visit_days={v: None for v in BTHEB_VISITS},
                        arms=("TAU", "BtheB"), reference="TAU", primary_visit="8m", population="all",
                        estimand=None)


def test_numbers_do_not_depend_on_the_thread_count(stacked_trial):
    # 21 shift tables: with fewer (4 x 2) the products stayed on one thread even without the limit.
    analysis = TippingPointAnalysis(id="tip", label="x", method="tipping_point", population="all",
                                    options={"imputations": 8, "burn_in": 10, "thinning": 2, "covariates": ["BASE"],
                                             "covariate_effects": "common", "shifts": [0, 5, 10, 15, 20, 25, 30],
                                             "reference_shifts": [0, -2.5, -5]})
    entries = []
    for threads in (1, 2):
        with threadpool_limits(limits=threads, user_api="blas"):
            entries.append(METHODS[analysis.method](stacked_trial, analysis, RunContext(root_seed=20261202)))
    assert entries[0]["tables"] == entries[1]["tables"]     # exactly, to the last bit
