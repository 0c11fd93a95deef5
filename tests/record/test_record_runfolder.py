"""Run folders: atomic creation, no overwrite, safe names, the sha256sum manifest format."""
from __future__ import annotations

import hashlib
import os
import re
import shutil
import subprocess
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from trialcut.errors import InputError, RunFolderError
from trialcut.record.manifest import MANIFEST_NAME, parse_manifest
from trialcut.record.runfolder import (STALE_AFTER_SECONDS, TEMP_PREFIX, list_run_folders,
                                       new_run_id, remove_stale_temporaries, safe_folder_name,
                                       write_run_folder)


def fill(folder: Path) -> None:
    (folder / "results.json").write_text('{"format": 1}\n', encoding="utf-8")
    (folder / "tables").mkdir()
    (folder / "tables" / "differences.csv").write_bytes(b"arm,estimate\r\nActive,-1.5\r\n")
    (folder / "report.html").write_text("<p>caf\u00e9</p>", encoding="utf-8")


def everything_under(root: Path) -> list[str]:
    return sorted(path.relative_to(root).as_posix() for path in root.rglob("*"))


def test_run_id_is_utc_time_then_suffix_and_sorts_by_time():
    early = datetime(2026, 12, 2, 10, 30, 15, tzinfo=timezone.utc)
    # The same instant written in another zone must give the same UTC stamp.
    same_instant = early.astimezone(timezone(timedelta(hours=-5)))
    first, second = new_run_id(early), new_run_id(same_instant)
    assert re.fullmatch(r"20261202T103015Z-[0-9a-f]{4}", first)
    assert second.startswith("20261202T103015Z-")
    later = new_run_id(early + timedelta(seconds=1))
    assert sorted([later, first]) == [first, later]


def test_write_creates_folder_with_every_file_listed(tmp_path):
    folder = write_run_folder(tmp_path, "STUDY-1", "interim_1", "20261202T103015Z-aaaa", fill)
    assert folder == tmp_path / "STUDY-1" / "interim_1" / "20261202T103015Z-aaaa"
    hashes, problems = parse_manifest((folder / MANIFEST_NAME).read_text("utf-8"), "manifest")
    assert problems == []
    assert sorted(hashes) == ["report.html", "results.json", "tables/differences.csv"]
    # Expected digests computed here with hashlib directly (Python standard library).
    for relative, digest in hashes.items():
        assert digest == hashlib.sha256((folder / relative).read_bytes()).hexdigest()
    # Nothing but the finished run folder is left in the cut folder.
    assert [entry.name for entry in folder.parent.iterdir()] == [folder.name]


def test_manifest_bytes_are_sorted_lines_with_two_spaces_and_lf(tmp_path):
    folder = write_run_folder(tmp_path, "S", "c", "r1", fill)
    raw = (folder / MANIFEST_NAME).read_bytes()
    assert b"\r" not in raw and raw.endswith(b"\n")
    lines = raw.decode("utf-8").splitlines()
    paths = [line.split("  ", 1)[1] for line in lines]
    assert paths == sorted(paths)
    assert all(re.fullmatch(r"[0-9a-f]{64}  \S.*", line) for line in lines)


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="coreutils sha256sum not on PATH")
def test_manifest_checks_with_coreutils_sha256sum(tmp_path):
    # Outside reference: GNU coreutils `sha256sum -c --strict` accepts only well-formed
    # lines and re-hashes every file itself.
    folder = write_run_folder(tmp_path, "S", "c", "r1", fill)
    checked = subprocess.run(["sha256sum", "-c", "--strict", MANIFEST_NAME], cwd=folder,
                             capture_output=True, text=True, timeout=30)
    assert checked.returncode == 0, checked.stdout + checked.stderr
    assert checked.stdout.count(": OK") == 3
    # And it does fail once a file changes, so the check above is not vacuous.
    (folder / "tables" / "differences.csv").write_bytes(b"arm,estimate\r\nActive,-1.6\r\n")
    rechecked = subprocess.run(["sha256sum", "-c", "--strict", MANIFEST_NAME], cwd=folder,
                               capture_output=True, text=True, timeout=30)
    assert rechecked.returncode == 1
    assert "tables/differences.csv: FAILED" in rechecked.stdout


@pytest.mark.parametrize("interruption", [RuntimeError("disk full"), KeyboardInterrupt()])
def test_failed_write_leaves_no_folder_and_no_temporary(tmp_path, interruption):
    def write_then_fail(folder: Path) -> None:
        fill(folder)
        raise interruption

    with pytest.raises(type(interruption)):
        write_run_folder(tmp_path, "S", "c", "r1", write_then_fail)
    cut_folder = tmp_path / "S" / "c"
    assert list(cut_folder.iterdir()) == []
    assert list_run_folders(tmp_path) == []


def test_interruption_while_hashing_leaves_nothing(tmp_path, monkeypatch):
    # Ctrl-C after `write` returned but before the rename: the manifest step is the one
    # in between, so interrupt it there.
    import trialcut.record.runfolder as runfolder

    def interrupted(folder):
        raise KeyboardInterrupt

    monkeypatch.setattr(runfolder, "write_manifest", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_run_folder(tmp_path, "S", "c", "r1", fill)
    assert everything_under(tmp_path) == ["S", "S/c"]


def test_existing_run_folder_is_never_overwritten(tmp_path):
    folder = write_run_folder(tmp_path, "S", "c", "r1", fill)
    before = (folder / MANIFEST_NAME).read_bytes()
    calls = []
    with pytest.raises(RunFolderError) as caught:
        write_run_folder(tmp_path, "S", "c", "r1", calls.append)
    assert caught.value.problems[0].code == "record.run_exists"
    assert calls == []   # refused before any work was done
    assert (folder / MANIFEST_NAME).read_bytes() == before
    assert isinstance(caught.value, InputError) and caught.value.exit_status == 2


def test_folder_appearing_during_the_write_is_not_replaced(tmp_path):
    # Another process takes the name while ours is writing: ours must fail, not replace it.
    final = tmp_path / "S" / "c" / "r1"

    def write_while_someone_else_finishes(folder: Path) -> None:
        fill(folder)
        final.mkdir()

    with pytest.raises(RunFolderError):
        write_run_folder(tmp_path, "S", "c", "r1", write_while_someone_else_finishes)
    assert final.is_dir() and list(final.iterdir()) == []
    assert [entry.name for entry in final.parent.iterdir()] == ["r1"]


@pytest.mark.parametrize("study, reason", [
    ("", "empty"), ("a/b", "path separator"), ("a\\b", "path separator"),
    ("..", "'..'"), ("x..y", "'..'"), (".hidden", ".hidden"), ("A B", "'A B'"),
    ("x" * 101, "101 characters"),
])
def test_unsafe_study_names_are_refused_with_a_suggestion(tmp_path, study, reason):
    with pytest.raises(RunFolderError) as caught:
        write_run_folder(tmp_path, study, "c", "r1", fill)
    problem = caught.value.problems[0]
    assert problem.code == "record.unsafe_name" and problem.field == "study id"
    assert reason in problem.got
    suggestion = re.search(r"use a name such as '([^']*)'", problem.hint).group(1)
    assert safe_folder_name(suggestion, "study id") == suggestion
    assert list(tmp_path.iterdir()) == []


def test_symbolic_links_are_refused(tmp_path):
    outside = tmp_path / "outside.txt"
    outside.write_text("x")

    def write_link(folder: Path) -> None:
        (folder / "data.csv").symlink_to(outside)

    with pytest.raises(RunFolderError) as caught:
        write_run_folder(tmp_path / "out", "S", "c", "r1", write_link)
    assert caught.value.problems[0].code == "record.symbolic_link"
    assert everything_under(tmp_path / "out") == ["S", "S/c"]


def test_stale_temporaries_are_skipped_by_listing_and_removed_after_an_hour(tmp_path):
    cut_folder = tmp_path / "S" / "c"
    stale = cut_folder / f"{TEMP_PREFIX}r0-dead"
    fresh = cut_folder / f"{TEMP_PREFIX}r9-busy"
    for folder in (stale, fresh):
        folder.mkdir(parents=True)
        (folder / "results.json").write_text("{}")
    old = time.time() - STALE_AFTER_SECONDS - 60
    os.utime(stale, (old, old))
    assert list_run_folders(tmp_path) == []
    write_run_folder(tmp_path, "S", "c", "r1", fill)
    names = sorted(entry.name for entry in cut_folder.iterdir())
    assert names == [fresh.name, "r1"]   # a younger one may be a run still being written
    assert list_run_folders(tmp_path) == [cut_folder / "r1"]
    assert remove_stale_temporaries(cut_folder, now=time.time() + 2 * STALE_AFTER_SECONDS) \
        == [fresh]


def test_listing_filters_by_study_and_cut(tmp_path):
    for study, cut, run in [("A", "c1", "r1"), ("A", "c2", "r2"), ("B", "c1", "r3")]:
        write_run_folder(tmp_path, study, cut, run, fill)
    assert [path.name for path in list_run_folders(tmp_path)] == ["r1", "r2", "r3"]
    assert [path.name for path in list_run_folders(tmp_path, study="A")] == ["r1", "r2"]
    assert [path.name for path in list_run_folders(tmp_path, cut="c1")] == ["r1", "r3"]
    assert list_run_folders(tmp_path, study="missing") == []


def test_failure_to_sync_after_the_rename_removes_the_new_folder(tmp_path, monkeypatch):
    # If the new name cannot be made durable, the folder must not stay without a registry row.
    import trialcut.record.runfolder as runfolder

    real_sync = runfolder._sync_directory
    cut_folder = tmp_path / "S" / "c"

    def sync_failing_on_the_cut_folder(folder: Path) -> None:
        if folder == cut_folder:
            raise OSError("input/output error")
        real_sync(folder)

    monkeypatch.setattr(runfolder, "_sync_directory", sync_failing_on_the_cut_folder)
    with pytest.raises(OSError):
        write_run_folder(tmp_path, "S", "c", "r1", fill)
    assert list(cut_folder.iterdir()) == []


@pytest.mark.skipif(shutil.which("sha256sum") is None, reason="coreutils sha256sum not on PATH")
def test_a_file_named_dash_is_checked_as_a_file_not_standard_input(tmp_path):
    # Outside reference: GNU coreutils `sha256sum -c` reads a line naming '-' from standard
    # input (found by the property test below), and './-' from the file.
    def write(folder: Path) -> None:
        (folder / "-").write_bytes(b"dash")
        (folder / "-a").write_bytes(b"dash a")

    folder = write_run_folder(tmp_path, "S", "c", "r1", write)
    text = (folder / MANIFEST_NAME).read_text("utf-8")
    assert [line.split("  ", 1)[1] for line in text.splitlines()] == ["-a", "./-"]
    hashes, problems = parse_manifest(text, "manifest")
    assert problems == [] and hashes["-"] == hashlib.sha256(b"dash").hexdigest()
    # Standard input holds other bytes: a manifest read from it would fail the check.
    checked = subprocess.run(["sha256sum", "-c", "--strict", MANIFEST_NAME], cwd=folder,
                             input=b"not the file", capture_output=True, timeout=30)
    assert checked.returncode == 0, checked.stdout + checked.stderr
    (folder / "-").write_bytes(b"changed")
    rechecked = subprocess.run(["sha256sum", "-c", "--strict", MANIFEST_NAME], cwd=folder,
                               input=b"dash", capture_output=True, timeout=30)
    assert rechecked.returncode == 1 and b"./-: FAILED" in rechecked.stdout


def test_a_manifest_line_naming_bare_dash_is_malformed():
    # sha256sum -c would hash standard input for it, so such a line checks nothing.
    text = f"{'0' * 64}  -\n{'1' * 64}  results.json\n"
    hashes, problems = parse_manifest(text, "manifest")
    assert hashes == {"results.json": "1" * 64}
    assert [(problem.code, problem.line) for problem in problems] == [("verify.manifest_malformed", 1)]


# Any file names a writer might use (letters of any script, digits, spaces, punctuation);
# only the characters sha256sum would have to escape, and '/', are left out.
FILE_NAMES = st.text(alphabet=st.characters(blacklist_categories=("Cs", "Cc"),
                                            blacklist_characters="/\\"),
                     min_size=1, max_size=12).filter(lambda name: name not in (".", ".."))


@settings(max_examples=15, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(files=st.dictionaries(FILE_NAMES, st.binary(max_size=64), min_size=1, max_size=5))
def test_any_plain_file_names_round_trip_through_the_manifest(tmp_path_factory, files):
    out = tmp_path_factory.mktemp("out")

    def write(folder: Path) -> None:
        for name, content in files.items():
            (folder / name).write_bytes(content)

    try:
        folder = write_run_folder(out, "S", "c", "r1", write)
    except OSError:
        assume(False)   # a name this file system cannot hold (e.g. too long in bytes)
    hashes, problems = parse_manifest((folder / MANIFEST_NAME).read_text("utf-8"), "manifest")
    assert problems == [] and set(hashes) == set(files) - {MANIFEST_NAME}
    for name in hashes:   # reference: hashlib over the bytes we wrote
        assert hashes[name] == hashlib.sha256(files[name]).hexdigest()
    if shutil.which("sha256sum"):   # outside reference: GNU coreutils reads the same lines
        checked = subprocess.run(["sha256sum", "-c", "--strict", "--quiet", MANIFEST_NAME],
                                 cwd=folder, capture_output=True, timeout=30)
        assert checked.returncode == 0, checked.stdout + checked.stderr
