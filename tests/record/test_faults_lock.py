"""A registry held by another writer (issue 10 finding 8): wait visibly, or stop early with exit 2.

The other writer is a plain sqlite3 connection holding the write lock (``BEGIN IMMEDIATE``),
as any program with the file open for writing would.  Nothing here depends on timing: the
patience is set to zero or the lock is released from the waiting message itself.
"""
from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

import trialcut.record.registry as registry_module
from trialcut.cli import main
from trialcut.record.registry import RegistryBusy, check_writable, list_records
from trialcut.record.runfolder import find_temporaries, list_run_folders
from tests.record.sealing import record_small_run

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


@pytest.fixture
def held(tmp_path):
    """An output folder with one run, whose registry another connection holds for writing."""
    out = tmp_path / "out"
    record_small_run(out, "r1")
    holder = sqlite3.connect(out / "registry.sqlite", isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")
    yield out, holder
    if holder.in_transaction:
        holder.execute("ROLLBACK")
    holder.close()


def test_a_run_stops_before_its_analysis_when_the_registry_stays_held(held, monkeypatch, capsys):
    out, _ = held
    monkeypatch.setattr(registry_module, "EARLY_PATIENCE_SECONDS", 0.0)

    def no_analysis(*args, **kwargs):
        raise AssertionError("the analysis ran although the registry was held")

    monkeypatch.setattr("trialcut.run.runner.run_plan", no_analysis)
    status = main(["run", str(BASE / "plan.yaml"), "--data", str(BASE / "data.csv"), "--cut", "c9",
                   "--out", str(out), "--unlocked"])
    shown = capsys.readouterr().err
    assert status == 2, shown
    assert "held by another writer" in shown and "Traceback" not in shown
    assert [row.record_id for row in list_records(out / "registry.sqlite")] == ["r1"]


def test_a_writer_waits_with_a_message_and_records_once_the_lock_is_free(held):
    out, holder = held
    waited = []

    def on_wait(seconds: float) -> None:
        waited.append(seconds)
        if holder.in_transaction:
            holder.execute("ROLLBACK")   # the other writer finishes while we wait

    recorded = record_small_run(out, "r2", cut="c2", on_wait=on_wait)
    assert waited, "the writer never said it was waiting"
    assert recorded.row.seq == 2 and recorded.folder.is_dir()


def test_a_writer_that_runs_out_of_patience_leaves_nothing(held):
    out, _ = held
    with pytest.raises(RegistryBusy) as caught:
        record_small_run(out, "r2", cut="c2", patience=0.0)
    assert caught.value.exit_status == 2
    assert "another process kept the registry locked" in caught.value.render()
    assert [folder.name for folder in list_run_folders(out)] == ["r1"]
    assert not find_temporaries(out)


def test_the_early_check_says_what_is_wrong_and_writes_nothing(tmp_path, held):
    out, _ = held
    messages = []
    with pytest.raises(RegistryBusy):
        check_writable(out / "registry.sqlite", patience=0.0, on_wait=messages.append)
    fresh = tmp_path / "fresh" / "registry.sqlite"
    check_writable(fresh)   # a new output folder is fine, and is not created by the check
    assert not fresh.parent.exists()
    blocked = tmp_path / "blocked"
    blocked.write_text("a file where the output folder should be")
    with pytest.raises(registry_module.InputError) as caught:
        check_writable(blocked / "registry.sqlite")
    assert caught.value.problems[0].code == "record.registry_unwritable"


def record_in_child(out: str, run_id: str, start) -> None:
    start.wait(timeout=60)   # all writers begin together, so they contend for the lock
    record_small_run(Path(out), run_id, cut=f"cut-{run_id}")


def test_three_writers_at_once_are_recorded_one_after_another(tmp_path):
    import multiprocessing

    from trialcut.record.registry import verify_chain
    from trialcut.record.verify import verify_all

    out = tmp_path / "out"
    context = multiprocessing.get_context("fork")
    start = context.Event()
    writers = [context.Process(target=record_in_child, args=(str(out), f"r{number}", start))
               for number in range(3)]
    for writer in writers:
        writer.start()
    start.set()
    for writer in writers:
        writer.join(timeout=120)
    assert [writer.exitcode for writer in writers] == [0, 0, 0]
    rows = list_records(out / "registry.sqlite")
    assert sorted(row.record_id for row in rows) == ["r0", "r1", "r2"]
    assert verify_chain(out / "registry.sqlite") == []
    assert verify_all(out, out / "registry.sqlite").ok
    # Each folder was filled knowing the exact chain head its row would follow.
    import json

    for row in rows:
        audit = json.loads((out / row.folder / "audit.json").read_text())
        assert audit["registry_follows"] == row.previous_hash


def test_a_read_only_registry_is_an_input_error_not_a_fault(tmp_path, monkeypatch):
    # Tests may run as root, which ignores file permissions: open the file read-only instead.
    out = tmp_path / "out"
    record_small_run(out, "r1")
    real_connect = registry_module._connect

    def read_only(target, uri=False, timeout=60.0):
        return real_connect(f"{Path(target).resolve().as_uri()}?mode=ro", uri=True, timeout=timeout)

    monkeypatch.setattr(registry_module, "_connect", read_only)
    with pytest.raises(registry_module.InputError) as caught:
        record_small_run(out, "r2", cut="c2")
    assert caught.value.problems[0].code == "record.registry_unwritable"
    assert not find_temporaries(out) and [f.name for f in list_run_folders(out)] == ["r1"]
