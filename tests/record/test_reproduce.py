"""Reproduction: the number-by-number comparison rules, and a recorded run reproduced exactly."""
from __future__ import annotations

import json
import shutil
from pathlib import Path

from trialcut.cli import main
from trialcut.record.reproduce import (DIFFER, EXACT, WITHIN, _number_verdict, compare_results,
                                       package_differences)

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


def test_numbers_are_exact_within_tolerance_or_different():
    # The stated rule: |a - b| <= tolerance * max(1, |a|, |b|) (common practice for relative
    # comparison of floating-point results).
    assert _number_verdict(1.5, 1.5, 1e-9) == EXACT
    assert _number_verdict(1000.0, 1000.0 + 5e-7, 1e-9) == WITHIN
    assert _number_verdict(1000.0, 1000.0 + 2e-6, 1e-9) == DIFFER
    assert _number_verdict(1e-12, 2e-12, 1e-9) == WITHIN   # the floor of 1 keeps tiny values apart from noise


def test_every_kind_of_difference_is_named_by_its_place():
    original = {"endpoints": [{"id": "e1", "n": 10, "label": "a", "gone": 1}], "populations": {"x": 2.0}}
    again = {"endpoints": [{"id": "e1", "n": 11, "label": "b", "new": 1}], "populations": {"x": 2.0}}
    numbers, exact, within, differences = compare_results(original, again)
    assert (numbers, exact, within) == (2, 1, 0)
    found = {(item.where, item.kind) for item in differences}
    assert found == {("endpoints[e1].n", "number"), ("endpoints[e1].label", "text"),
                     ("endpoints[e1].gone", "missing in the new run"), ("endpoints[e1].new", "new in the new run")}


def test_package_differences_name_both_versions():
    assert package_differences({"numpy": "2.0", "old": "1"}, {"numpy": "2.1", "new": "3"}) == [
        {"package": "new", "original": None, "now": "3"}, {"package": "numpy", "original": "2.0", "now": "2.1"},
        {"package": "old", "original": "1", "now": None}]


def test_a_recorded_run_reproduces_exactly_and_refuses_missing_data(tmp_path, capsys):
    data = tmp_path / "cut.csv"
    shutil.copyfile(BASE / "data.csv", data)
    out = tmp_path / "out"
    assert main(["run", str(BASE / "plan.yaml"), "--data", str(data), "--cut", "c1", "--out", str(out),
                 "--unlocked"]) == 0
    run = next(out.glob("LVT-201/c1/*"))
    report = tmp_path / "reproduction.json"
    assert main(["reproduce", str(run), "--to", str(report)]) == 0
    details = json.loads(report.read_text())
    assert details["verdict"] == "exact" and details["numbers"] > 100 and details["differences"] == []
    data.unlink()
    capsys.readouterr()
    assert main(["reproduce", str(run)]) == 2
    assert "pass --data FILE" in capsys.readouterr().err
