"""Reproduction: the number-by-number comparison rules, and a recorded run reproduced exactly."""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from trialcut.cli import main
from trialcut.record.reproduce import (DIFFER, EXACT, WITHIN, _number_verdict, compare_results,
                                       package_differences, set_aside_by_format)

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


@pytest.fixture(scope="module")
def recorded(tmp_path_factory) -> tuple[Path, Path]:
    """A run of the base case and its data cut: (run folder, data file)."""
    folder = tmp_path_factory.mktemp("recorded")
    data = folder / "cut.csv"
    shutil.copyfile(BASE / "data.csv", data)
    out = folder / "out"
    assert main(["run", str(BASE / "plan.yaml"), "--data", str(data), "--cut", "c1", "--out", str(out),
                 "--unlocked"]) == 0
    return next(out.glob("LVT-201/c1/*")), data


def test_a_recorded_run_reproduces_exactly_and_refuses_missing_data(recorded, tmp_path, capsys):
    run, data = recorded
    report = tmp_path / "reproduction.json"
    assert main(["reproduce", str(run), "--to", str(report)]) == 0
    details = json.loads(report.read_text())
    assert details["verdict"] == "exact" and details["numbers"] > 100 and details["differences"] == []
    data.unlink()
    capsys.readouterr()
    assert main(["reproduce", str(run)]) == 2
    assert "pass --data FILE" in capsys.readouterr().err


def _format_1_results(residuals_in_fit: bool) -> dict:
    """The shape results format 1 gave a repeated-measures analysis: its residuals under
    diagnostics.residuals (rows) and again under fit.residual_columns (columns)."""
    rows = [["P1", "week 2", 1.5, 0.25, 0.5], ["P2", "week 2", 1.0, -0.75, -1.5]]
    columns = ["subject", "visit", "fitted", "residual", "scaled_residual"]
    fit = {"structure": "unstructured", "converged": True}
    if residuals_in_fit:
        fit["residual_columns"] = {name: [row[i] for row in rows] for i, name in enumerate(columns)}
    analysis = {"id": "primary", "fit": fit, "diagnostics": {"residuals": {"title": "t", "columns": columns,
                                                                           "data": rows}}}
    return {"format": 1, "endpoints": [{"id": "e1", "analyses": [analysis]}]}


def test_a_format_1_run_is_compared_without_its_second_copy_of_the_residuals():
    original = _format_1_results(residuals_in_fit=True)
    again = {**_format_1_results(residuals_in_fit=False), "format": 2}
    numbers, _, _, differences = compare_results(original, again)
    assert {item.where for item in differences} == {"endpoints[e1].analyses[primary].fit.residual_columns"}
    trimmed, notes = set_aside_by_format(original, again)
    numbers, exact, _, differences = compare_results(trimmed, again)
    assert differences == [] and numbers == exact == 6    # the residuals are still compared, in diagnostics
    assert len(notes) == 1 and "results format 1" in notes[0] and "1 repeated-measures fit(s)" in notes[0]
    assert "residual_columns" in original["endpoints"][0]["analyses"][0]["fit"]    # the input is left as it was


def test_only_what_the_newer_format_left_out_is_set_aside():
    same_format = _format_1_results(residuals_in_fit=True)
    assert set_aside_by_format(same_format, _format_1_results(residuals_in_fit=True)) == (same_format, [])
    newer = {**_format_1_results(residuals_in_fit=False), "format": 2}
    assert set_aside_by_format(newer, newer) == (newer, [])
    # Anything else a format-1 run has and the new run lacks is still a difference.
    original = _format_1_results(residuals_in_fit=True)
    original["endpoints"][0]["analyses"][0]["fit"]["iterations"] = 7
    trimmed, _ = set_aside_by_format(original, newer)
    assert [item.where for item in compare_results(trimmed, newer)[3]] == [
        "endpoints[e1].analyses[primary].fit.iterations"]


def test_a_run_recorded_in_format_1_reproduces_with_a_note(recorded, tmp_path):
    from trialcut.commands_reproduce import reproduce_run

    run = shutil.copytree(recorded[0], tmp_path / "run")    # the recorded folder itself stays as it was
    results = json.loads((run / "results.json").read_text())
    assert results["format"] == 2
    fitted = [a for e in results["endpoints"] for a in e["analyses"] if "residuals" in a["diagnostics"]]
    assert fitted and not any("residual_columns" in a["fit"] for e in results["endpoints"] for a in e["analyses"])
    # Written back as format 1 wrote it: the residuals again under fit, by column.
    for analysis in fitted:
        table = analysis["diagnostics"]["residuals"]
        analysis["fit"]["residual_columns"] = {name: [row[i] for row in table["data"]]
                                               for i, name in enumerate(table["columns"])}
    results["format"] = 1
    (run / "results.json").write_text(json.dumps(results))
    outcome = reproduce_run(run, BASE / "data.csv", tmp_path / "scratch", 1e-9)
    assert outcome.verdict == "exact" and outcome.differences == ()
    assert len(outcome.notes) == 1 and f"{len(fitted)} repeated-measures fit(s)" in outcome.notes[0]
