"""Forged-but-rehashed records (issue 10 findings 2, 3, 4): what verify finds, and its limit.

A forger with write access to the output folder needs no secret: they can edit a row and
recompute the whole chain, or edit results.json and write a fresh manifest.  Each test
applies one such forgery with the tools in tamper.py (standard library only) and checks the
command line's answer.  The one forgery a registry file cannot reveal on its own (a rebuilt
consistent history) is caught only with a chain head kept elsewhere: that limit is checked
too, so the README's statement of it stays true.
"""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from trialcut.cli import main
from tests.record.sealing import ENTRY, record_small_run
from tests.record.tamper import (erase_newest, regenerate_manifest, rehash_chain,
                                 set_row_field)


@pytest.fixture
def outputs(tmp_path) -> Path:
    out = tmp_path / "outputs"
    record_small_run(out, "r1", entry={**ENTRY, "lock_status": "unlocked"})
    record_small_run(out, "r2", cut="c2", entry={**ENTRY, "dummy_arms": True})
    return out


def verify(capsys, *argv) -> tuple[int, str]:
    capsys.readouterr()
    status = main(["verify", *map(str, argv)])
    captured = capsys.readouterr()
    return status, captured.out + captured.err


def head_of(out: Path) -> str:
    import sqlite3

    with sqlite3.connect(out / "registry.sqlite") as connection:
        return connection.execute("SELECT row_hash FROM records ORDER BY seq DESC LIMIT 1").fetchone()[0]


@pytest.mark.parametrize("column, value, shown", [
    ("lock_status", "locked", "'unlocked'"),         # a rehearsal relabelled as locked (finding 2)
    ("plan_sha256", "e" * 64, "a" * 64),
    ("data_sha256", "f" * 64, "b" * 64),
    ("study_id", "OTHER", "'S'"),
    ("cut", "final", "'c1'"),
    ("dummy_arms", 1, "0"),
    ("created_utc", "2026-12-01T00:00:00Z", "2026-12-02T10:30:15Z"),
])
def test_an_edited_row_with_a_rebuilt_chain_is_caught_by_the_sealed_results(outputs, capsys,
                                                                             column, value, shown):
    set_row_field(outputs / "registry.sqlite", "r1", column, value)
    rehash_chain(outputs / "registry.sqlite")
    for argv in (["--out", outputs], [outputs / "S" / "c1" / "r1"]):
        status, text = verify(capsys, *argv)
        assert status == 1, text
        assert f"r1].{column}" in text and "the sealed results.json says" in text
        assert shown in text


def test_a_forged_result_with_a_fresh_manifest_is_caught_by_the_row(outputs, capsys, tmp_path,
                                                                    monkeypatch):
    run = outputs / "S" / "c2" / "r2"
    results = json.loads((run / "results.json").read_text())
    results["estimate"] = -9.99
    (run / "results.json").write_text(json.dumps(results, indent=1) + "\n")
    regenerate_manifest(run)
    # Finding 4: from a folder with no ./outputs, verify finds the registry beside the run.
    monkeypatch.chdir(tmp_path)
    status, text = verify(capsys, run)
    assert status == 1 and "does not match the hash recorded in the registry" in text, text


def test_a_fully_rebuilt_history_passes_without_an_anchor_and_fails_with_one(outputs, capsys):
    # The documented limit: change the result, the manifest, the row's manifest hash and the
    # chain, and the registry file alone is consistent again.  A head kept elsewhere is not.
    kept_head = head_of(outputs)
    run = outputs / "S" / "c2" / "r2"
    (run / "results.json").write_text((run / "results.json").read_text().replace("-1.25", "-9.99"))
    set_row_field(outputs / "registry.sqlite", "r2", "manifest_sha256", regenerate_manifest(run))
    rehash_chain(outputs / "registry.sqlite")
    status, text = verify(capsys, "--out", outputs)
    assert status == 0, text
    status, text = verify(capsys, "--out", outputs, "--head", kept_head)
    assert status == 1 and "no longer in the registry" in text, text


def test_an_erased_newest_run_is_caught_only_with_the_head_kept_elsewhere(outputs, capsys):
    # Finding 3: folder, row and SQLite's sequence memory all removed.
    kept_head = head_of(outputs)
    assert erase_newest(outputs / "registry.sqlite") == "r2"
    status, text = verify(capsys, "--out", outputs)
    assert status == 0, text
    status, text = verify(capsys, "--out", outputs, "--head", kept_head)
    assert status == 1 and "the chain head you kept is no longer in the registry" in text, text
    status, text = verify(capsys, outputs / "S" / "c1" / "r1", "--head", kept_head)
    assert status == 1, text


def test_a_kept_head_names_the_rows_recorded_after_it(outputs, capsys):
    first_head = head_of(outputs)
    record_small_run(outputs, "r3", cut="c3")
    status, text = verify(capsys, "--out", outputs, "--head", first_head)
    assert status == 0, text
    assert "1 row(s) recorded after it" in text and "run r3" in text
    status, text = verify(capsys, "--out", outputs, "--head", head_of(outputs))
    assert status == 0 and "0 row(s) recorded after it" in text


def test_verify_of_one_run_without_a_registry_says_so_and_fails(outputs, capsys, tmp_path):
    # Finding 4: a run folder copied away from its output root.
    import shutil

    copy = tmp_path / "elsewhere" / "S" / "c1" / "r1"
    shutil.copytree(outputs / "S" / "c1" / "r1", copy)
    status, text = verify(capsys, copy)
    assert status == 2 and "NOT VERIFIED AGAINST A REGISTRY" in text, text
    status, text = verify(capsys, copy, "--without-registry")
    assert status == 0 and "NOT VERIFIED AGAINST A REGISTRY" in text, text
    status, text = verify(capsys, copy, "--registry", outputs / "registry.sqlite")
    assert status == 0, text
    # A changed folder is said first, whatever the registry.
    (copy / "report.html").write_text("<html>changed</html>\n")
    status, text = verify(capsys, copy, "--without-registry")
    assert status == 1 and "report.html: changed" in text, text


def test_an_added_empty_folder_is_named(outputs, capsys):
    (outputs / "S" / "c1" / "r1" / "figures" / "extra").mkdir(parents=True)
    (outputs / "S" / "c1" / "stray").mkdir()
    status, text = verify(capsys, "--out", outputs)
    assert status == 1, text
    assert "figures/: an empty folder not listed in the manifest" in text
    assert "stray: this folder has no row in the registry" in text
