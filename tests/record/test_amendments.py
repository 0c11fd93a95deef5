"""Amendments explain themselves: what changed by plan item and field, and a flag when an
amendment was locked after a cut had been analysed with an earlier version."""
from __future__ import annotations

import json
import shutil
from pathlib import Path

from trialcut.cli import main
from trialcut.record.amendments import flag_late_amendments
from trialcut.record.registry import append_run

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


def test_runs_before_an_amendment_are_named_and_later_ones_are_not(tmp_path):
    registry = tmp_path / "registry.sqlite"
    for run_id, plan_hash, when in (("r1", "a" * 64, "2026-01-01T00:00:00Z"),
                                    ("r2", "b" * 64, "2026-03-01T00:00:00Z")):
        append_run(registry, {"run_id": run_id, "study_id": "S", "cut": run_id, "folder": f"S/{run_id}/{run_id}",
                              "plan_sha256": plan_hash, "lock_status": "locked", "dummy_arms": 0,
                              "data_sha256": "c" * 64, "manifest_sha256": "d" * 64, "created_utc": when})
    chain = [{"version": "1", "sha256": "a" * 64, "locked_utc": "2025-12-01T00:00:00Z"},
             {"version": "2", "sha256": "b" * 64, "locked_utc": "2026-02-01T00:00:00Z"},
             {"version": "3", "sha256": "e" * 64, "locked_utc": "2026-04-01T00:00:00Z"}]
    flagged = flag_late_amendments(chain, registry, "S")
    assert flagged[0]["runs_before"] == []
    assert [run["run_id"] for run in flagged[1]["runs_before"]] == ["r1"]
    assert [(run["run_id"], run["plan_version"]) for run in flagged[2]["runs_before"]] == [("r1", "1"), ("r2", "2")]
    assert flag_late_amendments(chain, registry, "other study")[2]["runs_before"] == []


def test_an_amendment_after_a_cut_is_explained_and_flagged_in_results_report_and_comparison(tmp_path):
    plan = tmp_path / "plan.yaml"
    shutil.copyfile(BASE / "plan.yaml", plan)
    out = tmp_path / "out"
    assert main(["lock", str(plan), "--by", "stat", "--reason", "first"]) == 0
    assert main(["run", str(plan), "--data", str(BASE / "data.csv"), "--cut", "early", "--out", str(out)]) == 0
    text = plan.read_text(encoding="utf-8")
    plan.write_text(text.replace("covariance: [unstructured, ar1]", "covariance: [unstructured, toeplitz]")
                    .replace('version: "1.0"', 'version: "1.1"'), encoding="utf-8")
    assert main(["lock", str(plan), "--by", "stat", "--reason", "fallback structure changed"]) == 0
    assert main(["run", str(plan), "--data", str(BASE / "data.csv"), "--cut", "late", "--out", str(out)]) == 0
    early, late = next(out.glob("LVT-201/early/*")), next(out.glob("LVT-201/late/*"))
    amendment = json.loads((late / "results.json").read_text())["plan"]["lock"]["amendments"][1]
    assert {"item": "endpoints[fbs_change].analyses.primary.options.covariance[1]",
            "old": '"ar1"', "new": '"toeplitz"'} in amendment["changes"]
    assert [run["cut"] for run in amendment["runs_before"]] == ["early"]
    assert "was locked after data cuts had already been analysed" in (late / "report.html").read_text()
    assert main(["compare", str(early), str(late)]) == 0
    comparison = next(out.glob("LVT-201/comparisons/*")) / "comparison.html"
    assert "after these data cuts had been analysed with an earlier version" in comparison.read_text()
