"""Where render and compare write, and what they read (issue 10 findings 1, 5, 6).

The documents themselves are the report layer's business (tests/report); here a stand-in
renderer writes a page and a copy of results.json, so each test shows only where files go,
that nothing sealed or non-empty is written into, that the inputs are verified first, and
that comparisons and renderings are sealed and registered so ``verify`` passes afterwards.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest

import trialcut.report
from trialcut.cli import main
from trialcut.record.registry import list_records
from tests.record.sealing import record_small_run
from tests.record.tamper import regenerate_manifest


def stand_in_render(run_folder: Path, out: Path | None = None) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(Path(run_folder) / "results.json", out / "results.json")
    (out / "report.html").write_text("<html>re-rendered</html>\n")
    return {"report.html": out / "report.html", "folder": out}


def stand_in_comparison(results_a, results_b, out: Path) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    (out / "comparison.html").write_text(f"<p>{results_a['run']['id']} vs {results_b['run']['id']}</p>\n")
    return {"comparison.html": out / "comparison.html"}


@pytest.fixture
def outputs(tmp_path, monkeypatch) -> Path:
    monkeypatch.setattr(trialcut.report, "render_run", stand_in_render)
    monkeypatch.setattr(trialcut.report, "render_comparison", stand_in_comparison, raising=False)
    out = tmp_path / "outputs"
    record_small_run(out, "r1")
    record_small_run(out, "r2", cut="c2")
    return out


def snapshot(folder: Path) -> dict[str, str]:
    return {path.relative_to(folder).as_posix(): hashlib.sha256(path.read_bytes()).hexdigest()
            for path in sorted(folder.rglob("*")) if path.is_file()}


def run_cli(capsys, *argv) -> tuple[int, str]:
    capsys.readouterr()
    status = main([str(arg) for arg in argv])
    captured = capsys.readouterr()
    return status, captured.out + captured.err


def test_comparisons_are_sealed_registered_and_never_overwritten(outputs, capsys):
    a, b = outputs / "S" / "c1" / "r1", outputs / "S" / "c2" / "r2"
    status, text = run_cli(capsys, "compare", a, b)
    assert status == 0, text
    first = [row for row in list_records(outputs / "registry.sqlite") if row.kind == "comparison"]
    first_folder = outputs / first[0].folder
    before = snapshot(first_folder)
    status, text = run_cli(capsys, "compare", a, b)
    assert status == 0, text
    comparisons = [row for row in list_records(outputs / "registry.sqlite") if row.kind == "comparison"]
    assert len(comparisons) == 2 and comparisons[0].folder != comparisons[1].folder
    assert snapshot(first_folder) == before
    assert [s["record_id"] for s in comparisons[1].details_dict()["sources"]] == ["r1", "r2"]
    status, text = run_cli(capsys, "verify", "--out", outputs)   # finding 1: no false alarm
    assert status == 0, text


def test_render_without_a_target_makes_a_new_sealed_rendering(outputs, capsys):
    status, text = run_cli(capsys, "render", outputs / "S" / "c1" / "r1")
    assert status == 0, text
    rendering = [row for row in list_records(outputs / "registry.sqlite") if row.kind == "rendering"]
    assert len(rendering) == 1 and rendering[0].folder.startswith("S/renderings/")
    folder = outputs / rendering[0].folder
    assert (folder / "results.json").read_bytes() == (outputs / "S/c1/r1/results.json").read_bytes()
    status, text = run_cli(capsys, "verify", "--out", outputs)
    assert status == 0, text
    status, text = run_cli(capsys, "verify", folder)
    assert status == 0, text


@pytest.mark.parametrize("argv, target", [
    (["render", "{r1}", "--to", "{r2}"], "{r2}"),                  # another run's sealed folder
    (["compare", "{r1}", "{r2}", "--to", "{r1}"], "{r1}"),         # one of its own inputs
    (["render", "{r1}", "--to", "{out}"], "{out}"),                 # the output root itself
    (["render", "{r1}", "--to", "{out}/S/loose"], "{out}"),        # a new folder inside it
    (["render", "{r1}", "--to", "{r1}/inside"], "{r1}"),           # inside a sealed folder
    (["compare", "{r1}", "{r2}", "--to", "{full}"], "{full}"),     # a folder with files in it
])
def test_sealed_and_non_empty_targets_are_refused_and_left_as_they_were(outputs, capsys, tmp_path,
                                                                         argv, target):
    full = tmp_path / "full"
    full.mkdir()
    (full / "notes.txt").write_text("someone's notes\n")
    tokens = {"{r1}": outputs / "S/c1/r1", "{r2}": outputs / "S/c2/r2", "{out}": outputs, "{full}": full}

    def expand(text: str) -> str:
        for token, value in tokens.items():
            text = text.replace(token, str(value))
        return text

    watched = Path(expand(target))
    before = snapshot(watched)
    status, text = run_cli(capsys, *map(expand, argv))
    assert status == 2 and "refusing to write into" in text, text
    assert snapshot(watched) == before
    status, text = run_cli(capsys, "verify", "--out", outputs)
    assert status == 0, text


def test_a_plain_copy_goes_to_a_new_folder_outside_the_output_folder(outputs, capsys, tmp_path):
    target = tmp_path / "for-review"
    status, text = run_cli(capsys, "render", outputs / "S/c1/r1", "--to", target)
    assert status == 0 and (target / "report.html").is_file(), text
    empty = tmp_path / "empty"
    empty.mkdir()
    status, text = run_cli(capsys, "compare", outputs / "S/c1/r1", outputs / "S/c2/r2", "--to", empty)
    assert status == 0 and (empty / "comparison.html").is_file(), text
    assert not list(tmp_path.glob(".tmp-*"))
    assert [row.kind for row in list_records(outputs / "registry.sqlite")] == ["run", "run"]


@pytest.mark.parametrize("command", ["render", "compare"])
def test_a_forged_input_is_refused_before_anything_is_written(outputs, capsys, tmp_path, command):
    # Finding 5: results.json edited and its manifest written afresh.
    run = outputs / "S" / "c2" / "r2"
    results = json.loads((run / "results.json").read_text())
    results["estimate"] = -9.99
    (run / "results.json").write_text(json.dumps(results))
    regenerate_manifest(run)
    argv = [command, run] if command == "render" else [command, outputs / "S/c1/r1", run]
    for extra in ([], ["--to", tmp_path / "copy"]):
        status, text = run_cli(capsys, *argv, *extra)
        assert status == 1 and f"refusing to {command}" in text, text
        assert "does not match the hash recorded in the registry" in text
    assert not (tmp_path / "copy").exists()
    assert [row.kind for row in list_records(outputs / "registry.sqlite")] == ["run", "run"]
