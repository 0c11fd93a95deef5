"""The whole pipeline through the command line on the small base case (tests/cases/_base)."""
from __future__ import annotations

import json
import shutil
import sqlite3
from pathlib import Path

import pytest

from trialcut.cli import main

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


def _run(out: Path, *extra: str, plan: Path = BASE / "plan.yaml") -> Path:
    status = main(["run", str(plan), "--data", str(BASE / "data.csv"), "--cut", "c1", "--out", str(out), *extra])
    assert status == 0
    folders = sorted(p for p in out.glob("*/c1/*") if (p / "results.json").exists())
    return folders[-1]


def _without_run_metadata(results: dict) -> dict:
    results = json.loads(json.dumps(results))
    results.pop("run")
    return results


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    out = tmp_path_factory.mktemp("out")
    first = _run(out, "--unlocked")
    second = _run(out, "--unlocked")
    return out, first, second


def test_same_inputs_give_identical_results(two_runs):
    # Determinism (issue 2): identical results.json apart from run metadata.
    _, first, second = two_runs
    a = json.loads((first / "results.json").read_text())
    b = json.loads((second / "results.json").read_text())
    assert first != second
    assert _without_run_metadata(a) == _without_run_metadata(b)


def test_run_folder_holds_the_review_package(two_runs):
    _, folder, _ = two_runs
    for name in ("results.json", "audit.json", "report.html", "report.pdf", "MANIFEST.sha256",
                 "data_manifest.json", "conformance.json"):
        assert (folder / name).is_file(), name
    assert list((folder / "tables").glob("*.csv"))
    assert (folder / "plan" / "plan.yaml").is_file()
    # The derived analysis data (issue 8 item 6), hashed in the manifest like every file.
    manifest = (folder / "MANIFEST.sha256").read_text(encoding="utf-8")
    for name in ("fbs_change.parquet", "fbs_change.json", "derivations.txt"):
        assert (folder / "analysis_data" / name).is_file() and f"analysis_data/{name}" in manifest, name
    audit = json.loads((folder / "audit.json").read_text())
    results = json.loads((folder / "results.json").read_text())
    # No --cut-off given: the latest date in the data, said in the warnings and the audit.
    assert audit["cut_off"]["source"] == results["data"]["cut_off"]["source"]
    assert results["endpoints"][0]["flow"][0]["table"]["columns"][:3] == ["visit", "step", "label"]


def test_unlocked_run_is_marked_everywhere(two_runs):
    out, folder, _ = two_runs
    results = json.loads((folder / "results.json").read_text())
    assert results["run"]["unlocked"] is True and results["plan"]["lock_status"] == "unlocked"
    assert "unlocked" in (folder / "report.html").read_text(encoding="utf-8").lower()
    with sqlite3.connect(out / "registry.sqlite") as connection:
        statuses = {row[0] for row in connection.execute("select lock_status from records where kind = 'run'")}
    assert statuses == {"unlocked"}


def test_registry_and_verification(two_runs):
    out, folder, _ = two_runs
    assert main(["history", "--out", str(out)]) == 0
    assert main(["verify", str(folder), "--out", str(out)]) == 0
    assert main(["verify", "--out", str(out)]) == 0


def test_locked_run_and_dummy_arms(tmp_path):
    plan = tmp_path / "plan.yaml"
    shutil.copyfile(BASE / "plan.yaml", plan)
    assert main(["run", str(plan), "--data", str(BASE / "data.csv"), "--cut", "c1",
                 "--out", str(tmp_path / "out")]) == 2  # not locked yet
    assert not (tmp_path / "out" / "registry.sqlite").exists() or not list((tmp_path / "out").glob("*/c1/*"))
    assert main(["lock", str(plan), "--by", "tester", "--reason", "test"]) == 0
    folder = _run(tmp_path / "out", "--dummy-arms", "7", plan=plan)
    results = json.loads((folder / "results.json").read_text())
    assert results["plan"]["lock_status"] == "locked"
    assert results["run"]["dummy_arms_seed"] == 7
    assert "dummy" in (folder / "report.html").read_text(encoding="utf-8").lower()


def test_render_rebuilds_from_results_alone(two_runs, tmp_path):
    _, folder, _ = two_runs
    assert main(["render", str(folder), "--to", str(tmp_path / "again")]) == 0
    assert (tmp_path / "again" / "report.html").is_file()


def test_compare_two_runs(two_runs, tmp_path):
    _, first, second = two_runs
    assert main(["compare", str(first), str(second), "--to", str(tmp_path / "cmp")]) == 0
    assert list((tmp_path / "cmp").glob("*.html"))


def test_results_follow_the_shipped_json_schema(two_runs):
    import jsonschema

    from trialcut.run.results_schema import results_schema

    _, folder, _ = two_runs
    jsonschema.validate(json.loads((folder / "results.json").read_text()), results_schema())
