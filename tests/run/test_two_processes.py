"""Endpoints on two processes give exactly the results of one process (issue 13).

The reference is the same plan run in one process (``TRIALCUT_ANALYSE_IN_PROCESS``): results do
not depend on where a piece of work runs (the determinism rule of issue 4; common practice for
parallel statistical software).  The demo plan has three endpoints (a score, a responder and a
count), run here on a small simulated trial with few imputations; the data are the demo
simulator's, so this checks mechanics, not statistical correctness.  Failures follow what a
serial loop does: the first endpoint in plan order that fails raises, with its own type and
message, whether it failed here or in the child.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.data.simulate import demo_cut_offs, demo_cuts
from trialcut.forking import can_fork
from trialcut.plan.load import load_plan
from trialcut.run import runner
from trialcut.run.context import RunContext
from trialcut.run.executor import ProcessPoolExecutor
from trialcut.run.runner import StepTimer, run_plan

DEMO_PLAN = Path(runner.__file__).resolve().parents[1] / "analysis_plans" / "demo.yaml"
SERIAL = "TRIALCUT_ANALYSE_IN_PROCESS"

# Run first (conftest.py), while the test process has no other thread.
pytestmark = [pytest.mark.forks, pytest.mark.skipif(not can_fork() or len(os.sched_getaffinity(0)) < 2,
                                                    reason="needs fork and two cores")]


def _quick(analysis):
    fewer = {key: value for key, value in (("imputations", 5), ("burn_in", 20))
             if key in type(analysis.options).model_fields}
    return analysis.model_copy(update={"options": analysis.options.model_copy(update=fewer)}) if fewer else analysis


def _quick_plan():
    plan = load_plan(DEMO_PLAN).plan
    endpoints = []
    for endpoint in plan.endpoints:
        analyses = endpoint.analyses.model_copy(update={
            "primary": _quick(endpoint.analyses.primary),
            "sensitivity": tuple(_quick(a) for a in endpoint.analyses.sensitivity)})
        endpoints.append(endpoint.model_copy(update={"analyses": analyses}))
    return plan.model_copy(update={"endpoints": tuple(endpoints)})


@pytest.fixture(scope="module")
def plan_and_cut():
    plan = _quick_plan()
    raw = raw_from_frame(demo_cuts(7, 120)["final"], "simulated.csv")
    cut = prepare_cut(plan, raw, cut_off=demo_cut_offs()["final"])
    assert len(cut.plan.endpoints) >= 3
    return cut.plan, cut


def _run(plan, cut, *, progress=None, executor=None):
    timer = StepTimer()
    context = RunContext(root_seed=plan.seed, progress=progress, **({"executor": executor} if executor else {}))
    results = run_plan(plan, cut, context, plan_block={}, data_block={}, run_block={}, timer=timer)
    return results, [step["step"] for step in timer.steps]


@pytest.fixture(scope="module")
def serial(plan_and_cut):
    plan, cut = plan_and_cut
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv(SERIAL, "1")
        return _run(plan, cut)


@pytest.fixture(autouse=True)
def _this_process_may_fork():
    """Fail at once, naming them, if threads left by an earlier test keep this process from forking
    (the tests below would otherwise wait for a child that never comes)."""
    others = [t.name for t in threading.enumerate() if t is not threading.current_thread()]
    assert can_fork(), f"this process cannot fork a helper: threads left running by another test: {others}"


def _until_exists(marker: Path, seconds: float = 60.0) -> None:
    waited = 0.0
    while not marker.exists() and waited < seconds:
        time.sleep(0.01)
        waited += 0.01


def _marking_process(patch, marker: Path | None = None, also=None):
    """Record in each endpoint entry which process computed it (and run ``also`` first).

    With a ``marker`` the child touches it on taking an endpoint and this process waits for it
    before its own: whatever the scheduling, the child then has an endpoint (no timing in tests).
    """
    original = runner._run_endpoint
    parent = os.getpid()

    def run_endpoint(plan, cut, endpoint, context, timer, run_warnings):
        if marker is not None and os.getpid() != parent:
            marker.touch()
        elif marker is not None:
            _until_exists(marker)
        if also is not None:
            also(endpoint, context)
        return original(plan, cut, endpoint, context, timer, run_warnings) | {"process": os.getpid()}

    patch.setattr(runner, "_run_endpoint", run_endpoint)


def _without_process(results):
    results = json.loads(json.dumps(results))
    processes = {entry.pop("process") for entry in results["endpoints"]}
    return results, processes


def test_two_processes_give_the_results_of_one(plan_and_cut, serial, monkeypatch, tmp_path):
    plan, cut = plan_and_cut
    _marking_process(monkeypatch, tmp_path / "child_took_one")
    results, steps = _run(plan, cut)
    results, processes = _without_process(results)
    assert processes - {os.getpid()}, "no endpoint ran in the second process"
    assert os.getpid() in processes, "the first (largest) endpoint stays in this process"
    expected, expected_steps = serial
    assert json.dumps(results, sort_keys=True) == json.dumps(expected, sort_keys=True)
    # Endpoints, run warnings and timed steps in plan order, as one process has them.
    assert [e["id"] for e in results["endpoints"]] == [e.id for e in plan.endpoints]
    assert results["warnings"] == expected["warnings"]
    assert steps == expected_steps
    assert threading.active_count() == 1, "the reading thread is gone: a later fork stays safe"


def test_analysis_datasets_made_where_each_endpoint_ran_equal_those_made_here(plan_and_cut, monkeypatch, tmp_path):
    # Identity: the datasets the record layer writes do not depend on which process built them.
    import pandas as pd

    plan, cut = plan_and_cut
    _marking_process(monkeypatch, tmp_path / "child_took_one")
    datasets: list = []
    run_plan(plan, cut, RunContext(root_seed=plan.seed), plan_block={}, data_block={}, run_block={},
             datasets=datasets)
    expected = runner.analysis_datasets(plan, cut)
    assert [d.endpoint for d in datasets] == [e.id for e in plan.endpoints]
    for got, want in zip(datasets, expected):
        pd.testing.assert_frame_equal(got.frame, want.frame)
        assert got.labels == want.labels and got.rules == want.rules


def test_the_childs_progress_reaches_the_parents_reporter(plan_and_cut, monkeypatch, tmp_path):
    plan, cut = plan_and_cut
    _marking_process(monkeypatch, tmp_path / "child_took_one",
                     also=lambda endpoint, context: context.progress(f"endpoint {endpoint.id}", 1, 1))
    calls = []
    results, _ = _run(plan, cut, progress=lambda label, done, total: calls.append((label, done, total)))
    _, processes = _without_process(results)
    assert len(processes) == 2
    for endpoint in plan.endpoints:
        assert (f"endpoint {endpoint.id}", 1, 1) in calls


def test_an_endpoint_that_fails_everywhere_raises_as_in_one_process(plan_and_cut, monkeypatch):
    plan, cut = plan_and_cut
    last, middle = plan.endpoints[-1].id, plan.endpoints[1].id

    def fail(endpoint, context):
        if endpoint.id in (middle, last):    # two failures: the first in plan order surfaces
            raise ValueError(f"a bug in endpoint {endpoint.id}")

    _marking_process(monkeypatch, also=fail)
    with pytest.raises(ValueError, match=f"^a bug in endpoint {middle}$"):
        _run(plan, cut)
    monkeypatch.setenv(SERIAL, "1")
    with pytest.raises(ValueError, match=f"^a bug in endpoint {middle}$"):
        _run(plan, cut)


def test_an_endpoint_that_fails_only_in_the_child_is_run_again_here(plan_and_cut, serial, monkeypatch, tmp_path):
    plan, cut = plan_and_cut
    parent = os.getpid()

    def fail_in_child(endpoint, context):
        if os.getpid() != parent:
            raise MemoryError("the child ran out of memory")

    _marking_process(monkeypatch, tmp_path / "child_took_one", also=fail_in_child)
    results, steps = _run(plan, cut)
    assert (tmp_path / "child_took_one").exists()
    results, processes = _without_process(results)
    assert processes == {parent}
    assert json.dumps(results, sort_keys=True) == json.dumps(serial[0], sort_keys=True)
    assert steps == serial[1]


def test_a_killed_child_does_not_hang_the_parent(plan_and_cut, serial, monkeypatch, tmp_path):
    plan, cut = plan_and_cut
    parent = os.getpid()

    def die_in_child(endpoint, context):
        if os.getpid() != parent:
            os.kill(os.getpid(), signal.SIGKILL)

    _marking_process(monkeypatch, tmp_path / "child_took_one", also=die_in_child)
    previous = signal.signal(signal.SIGALRM, lambda *_: pytest.fail("the parent hung after its child was killed"))
    signal.alarm(120)
    try:
        results, _ = _run(plan, cut)
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)
    results, processes = _without_process(results)
    assert processes == {parent}
    assert json.dumps(results, sort_keys=True) == json.dumps(serial[0], sort_keys=True)


def test_one_process_when_the_cores_are_already_used_or_there_is_one_endpoint(plan_and_cut, monkeypatch):
    plan, _ = plan_and_cut
    assert runner._second_core_helps(plan, RunContext(root_seed=1))
    monkeypatch.setenv(SERIAL, "1")
    assert not runner._second_core_helps(plan, RunContext(root_seed=1))
    monkeypatch.delenv(SERIAL)
    # --workers already spreads the imputations over processes: no second layer of processes.
    assert not runner._second_core_helps(plan, RunContext(root_seed=1, executor=ProcessPoolExecutor(2)))
    one = plan.model_copy(update={"endpoints": plan.endpoints[:1]})
    assert not runner._second_core_helps(one, RunContext(root_seed=1))
    # Another thread (a thread could hold a lock the fork copies): no fork.
    stop = threading.Event()
    other = threading.Thread(target=stop.wait)
    other.start()
    try:
        assert not runner._second_core_helps(plan, RunContext(root_seed=1))
    finally:
        stop.set()
        other.join()


STOPPED_PARENT = textwrap.dedent('''
    import os, signal, sys, time
    from trialcut.run.two_processes import run_pieces

    parent, marker = os.getpid(), sys.argv[1]

    def interrupt(*_):    # what the command line does with SIGTERM
        raise KeyboardInterrupt("stopped by SIGTERM")

    signal.signal(signal.SIGTERM, interrupt)

    def run_one(index, progress):
        if os.getpid() != parent:
            with open(marker, "w") as file:
                file.write(str(os.getpid()))
        time.sleep(120)
        return index

    try:
        run_pieces(2, run_one, order=[0, 1], progress=None, two_processes=True)
    except KeyboardInterrupt:
        print("stopped")
        sys.exit(130)
''')


@pytest.mark.parametrize("how", ["ctrl-c", "sigterm", "parent killed"])
def test_stopping_the_parent_stops_the_child_quietly(tmp_path, how):
    # Ctrl-C reaches the whole process group; SIGTERM and SIGKILL only the parent.  Either way the
    # child must not outlive the parent nor print a traceback; `communicate` returns only once
    # every holder of the stderr pipe (the child too) is gone.
    marker = tmp_path / "child_started"
    parent = subprocess.Popen([sys.executable, "-c", STOPPED_PARENT, str(marker)], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, start_new_session=True)
    waited = 0.0
    while not (marker.exists() and marker.read_text()) and waited < 60:
        time.sleep(0.05)
        waited += 0.05
    assert marker.exists(), "the child never started"
    if how == "ctrl-c":
        os.killpg(parent.pid, signal.SIGINT)
    else:
        os.kill(parent.pid, signal.SIGTERM if how == "sigterm" else signal.SIGKILL)
    output, error = parent.communicate(timeout=60)
    if how == "parent killed":
        assert parent.returncode == -signal.SIGKILL
    else:
        assert (parent.returncode, output.decode().strip()) == (130, "stopped"), error.decode()
    assert b"Traceback" not in error, error.decode()


def test_the_methods_said_to_need_statsmodels_are_methods():
    from trialcut.run.methods import METHODS

    assert runner._STATSMODELS_METHODS <= set(METHODS)


def test_an_answer_that_does_not_pickle_is_computed_again_here(tmp_path):
    from trialcut.run.two_processes import run_pieces

    parent = os.getpid()

    marker = tmp_path / "child_took_one"

    def run_one(index, progress):
        if os.getpid() == parent:
            _until_exists(marker)   # the child has a piece before this process takes a second one
            return index, "here"
        marker.touch()
        return index, lambda: "a function does not pickle"

    answers = run_pieces(4, run_one, order=[0, 1, 2, 3], progress=None, two_processes=True)
    assert answers == [(index, "here") for index in range(4)]
    assert marker.exists(), "the child took no piece"
