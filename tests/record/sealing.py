"""Small recorded runs for the record layer's tests, without running an analysis.

``record_small_run`` seals and registers a run folder whose results.json carries exactly the
facts its registry row repeats (run id, study, cut, start time, plan and data hashes, lock
status, dummy arms), as a real run's does, plus a table and a page.
"""
from __future__ import annotations

import json
from pathlib import Path

from trialcut.record.seal import RecordedFolder, record_run

ENTRY = {"plan_sha256": "a" * 64, "lock_status": "locked", "dummy_arms": False,
         "data_sha256": "b" * 64, "created_utc": "2026-12-02T10:30:15Z"}


def small_results(run_id: str, study: str, cut: str, entry: dict) -> dict:
    return {"format": 1,
            "run": {"id": run_id, "study_id": study, "cut": cut, "started_utc": entry["created_utc"],
                    "unlocked": entry["lock_status"] != "locked",
                    "dummy_arms_seed": 11 if entry["dummy_arms"] else None},
            "plan": {"sha256": entry["plan_sha256"], "lock_status": entry["lock_status"]},
            "data": {"sha256": entry["data_sha256"]}, "estimate": -1.25}


def run_writer(run_id: str, study: str, cut: str, entry: dict = ENTRY):
    def write(folder: Path, position) -> None:
        results = small_results(run_id, study, cut, entry)
        (folder / "results.json").write_text(json.dumps(results, indent=1) + "\n", encoding="utf-8")
        (folder / "audit.json").write_text(json.dumps({"registry_follows": position.previous_hash}),
                                           encoding="utf-8")
        (folder / "tables").mkdir()
        (folder / "tables" / "differences.csv").write_text("arm,estimate\nActive,-1.25\n")
        (folder / "report.html").write_text("<html></html>\n")
    return write


def record_small_run(out: Path, run_id: str, study: str = "S", cut: str = "c1",
                     entry: dict = ENTRY, **options) -> RecordedFolder:
    return record_run(out, out / "registry.sqlite", study, cut, run_id,
                      run_writer(run_id, study, cut, entry), entry, **options)
