"""Verification of run folders and of the whole output folder."""
from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import pytest

from trialcut.errors import InputError, VerificationFailed
from trialcut.record.manifest import MANIFEST_NAME
from trialcut.record.verify import verify_all, verify_run
from tests.record.sealing import record_small_run
from tests.record.tamper import apply_tamper


@pytest.fixture
def outputs(tmp_path) -> Path:
    out = tmp_path / "outputs"
    for run_id in ("r1", "r2", "r3"):
        record_small_run(out, run_id)
    return out


def run(outputs: Path, run_id: str = "r2") -> Path:
    return outputs / "S" / "c1" / run_id


def findings(call) -> list[tuple[str, str | None]]:
    with pytest.raises(VerificationFailed) as caught:
        call()
    assert caught.value.exit_status == 1
    return [(problem.code, problem.field) for problem in caught.value.problems]


def test_untouched_runs_verify(outputs):
    report = verify_run(run(outputs), outputs / "registry.sqlite")
    assert report.ok and report.files_checked == 4 and report.registry_rows_checked == 3
    alone = verify_run(run(outputs))   # the folder alone, without a registry
    assert alone.ok and "no registry" in alone.summary.lower()
    everything = verify_all(outputs, outputs / "registry.sqlite")
    assert everything.ok and everything.files_checked == 12
    assert everything.to_dict()["problems"] == []


def test_edited_deleted_and_added_files_are_each_named(outputs):
    folder = run(outputs)
    apply_tamper(folder, outputs / "registry.sqlite", {"edit_file": "tables/differences.csv"})
    apply_tamper(folder, outputs / "registry.sqlite", {"delete_file": "report.html"})
    apply_tamper(folder, outputs / "registry.sqlite", {"add_file": "tables/extra.csv"})
    found = findings(lambda: verify_run(folder, outputs / "registry.sqlite"))
    assert sorted(found) == [("verify.file_added", "tables/extra.csv"),
                             ("verify.file_changed", "tables/differences.csv"),
                             ("verify.file_missing", "report.html")]


def test_a_single_flipped_bit_is_found(outputs):
    folder = run(outputs)
    before = (folder / "results.json").stat().st_size
    apply_tamper(folder, outputs / "registry.sqlite", {"edit_file": "results.json"})
    assert (folder / "results.json").stat().st_size == before
    assert findings(lambda: verify_run(folder)) == [("verify.file_changed", "results.json")]


def test_an_edited_manifest_no_longer_matches_the_registry(outputs):
    # Someone edits a file and rewrites its manifest line to match: only the registry's
    # record of the manifest hash can catch that.
    folder = run(outputs)
    (folder / "results.json").write_text(
        (folder / "results.json").read_text().replace('"estimate": -1.25', '"estimate": -9.99'))
    import hashlib   # the forger's tool: Python's hashlib
    lines = (folder / MANIFEST_NAME).read_text().splitlines()
    digest = hashlib.sha256((folder / "results.json").read_bytes()).hexdigest()
    forged = [f"{digest}  results.json" if line.endswith("  results.json") else line
              for line in lines]
    (folder / MANIFEST_NAME).write_text("\n".join(forged) + "\n")
    assert verify_run(folder).ok   # the folder alone cannot tell
    found = findings(lambda: verify_run(folder, outputs / "registry.sqlite"))
    assert [code for code, _ in found] == ["verify.manifest_hash_mismatch"]


def test_a_malformed_manifest_line_is_a_finding(outputs):
    folder = run(outputs)
    with open(folder / MANIFEST_NAME, "a", encoding="utf-8") as handle:
        handle.write("not a manifest line\n")
        handle.write("0" * 64 + "  ../outside.txt\n")
    found = findings(lambda: verify_run(folder))
    assert [code for code, _ in found] == ["verify.manifest_malformed"] * 2


def test_registry_tampering_is_found_from_any_run(outputs):
    registry = outputs / "registry.sqlite"
    apply_tamper(run(outputs, "r1"), registry, {"edit_registry_row": "data_sha256"})
    # Checking r3 still walks the whole chain and names r1's row.
    found = findings(lambda: verify_run(run(outputs, "r3"), registry))
    assert found == [("registry.row_changed", "records[seq 1, run r1]")]


def test_a_deleted_row_leaves_its_folder_unregistered(outputs):
    registry = outputs / "registry.sqlite"
    apply_tamper(run(outputs, "r3"), registry, {"delete_registry_row": True})
    found = findings(lambda: verify_run(run(outputs, "r3"), registry))
    assert sorted(code for code, _ in found) == ["registry.rows_removed_at_end",
                                                 "verify.not_registered"]
    with pytest.raises(VerificationFailed) as caught:
        verify_all(outputs, registry)
    assert [(problem.code, Path(problem.file).name) for problem in caught.value.problems
            if problem.code.startswith("verify.")] == [("verify.folder_unregistered", "r3")]


def test_verify_all_names_a_missing_folder(outputs):
    shutil.rmtree(run(outputs, "r1"))
    found = findings(lambda: verify_all(outputs, outputs / "registry.sqlite"))
    assert found == [("verify.folder_missing", "records[seq 1, run r1]")]


def test_a_deleted_manifest_of_a_registered_run_is_a_finding(outputs):
    (run(outputs) / MANIFEST_NAME).unlink()
    found = findings(lambda: verify_run(run(outputs), outputs / "registry.sqlite"))
    assert [code for code, _ in found] == ["verify.manifest_missing"]


def test_a_folder_that_is_not_a_run_is_an_input_error(tmp_path, outputs):
    with pytest.raises(InputError) as caught:
        verify_run(tmp_path)
    assert caught.value.exit_status == 2
    assert caught.value.problems[0].code == "verify.not_a_run_folder"
    assert "MANIFEST.sha256" in caught.value.problems[0].expected
    with pytest.raises(InputError):
        verify_run(tmp_path / "no-such-folder")


def test_a_missing_registry_is_an_input_error(outputs, tmp_path):
    with pytest.raises(InputError) as caught:
        verify_run(run(outputs), tmp_path / "elsewhere.sqlite")
    assert caught.value.problems[0].code == "verify.registry_missing"
    assert "--registry" in caught.value.problems[0].hint
    with pytest.raises(InputError):
        verify_all(outputs, tmp_path / "elsewhere.sqlite")


def test_verification_opens_the_registry_read_only(outputs):
    registry = outputs / "registry.sqlite"
    before = registry.read_bytes()
    verify_all(outputs, registry)
    assert registry.read_bytes() == before
    # sqlite3 itself confirms the file is still a sound database.
    with sqlite3.connect(registry) as connection:
        assert connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    connection.close()


def test_a_copied_output_folder_still_verifies(outputs, tmp_path):
    # Rows store folders relative to the registry, so the whole output folder can move.
    moved = tmp_path / "handed-to-reviewer"
    shutil.copytree(outputs, moved)
    assert verify_all(moved, moved / "registry.sqlite").ok
