"""The demo workspace when the shipped demo plan changed since an earlier demo locked it.

Amendments need a new plan version (common practice; plan/lock.py refuses a second content under
one version), so the demo sets the earlier plan and its lock aside and locks the new plan afresh.
"""
from __future__ import annotations

import shutil
from pathlib import Path

from trialcut.commands import _set_aside_earlier_demo_plan
from trialcut.plan.load import load_plan
from trialcut.plan.lock import lock_file_for, lock_plan, read_chain

BASE_PLAN = Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"


def test_a_changed_demo_plan_starts_a_chain_of_its_own_and_the_earlier_lock_is_kept(tmp_path):
    plan = tmp_path / "demo.yaml"
    shutil.copyfile(BASE_PLAN, plan)
    first = lock_plan(load_plan(plan), by="demo", reason="first demo")
    _set_aside_earlier_demo_plan(plan)
    (kept,) = (tmp_path / "superseded").iterdir()
    assert sorted(p.name for p in kept.iterdir()) == ["demo.yaml", "demo.yaml.lock.json"]
    assert read_chain(kept / "demo.yaml.lock.json") == (first,)
    plan.write_text(BASE_PLAN.read_text(encoding="utf-8").replace("seed: 7", "seed: 8"), encoding="utf-8")
    lock_plan(load_plan(plan), by="demo", reason="changed demo")   # same version, fresh chain: accepted
    assert len(read_chain(lock_file_for(plan))) == 1


def test_a_plan_never_locked_is_left_where_it_is(tmp_path):
    plan = tmp_path / "demo.yaml"
    shutil.copyfile(BASE_PLAN, plan)
    _set_aside_earlier_demo_plan(plan)
    assert plan.exists() and not (tmp_path / "superseded").exists()
