"""Registry: hash chain, tamper detection, concurrent appends, record_run rollback."""
from __future__ import annotations

import hashlib
import json
import multiprocessing
import sqlite3
from pathlib import Path

import pytest

from trialcut.errors import InputError, TrialcutError
from trialcut.record.manifest import MANIFEST_NAME
from trialcut.record.registry import append_run, find_run, list_runs, verify_chain
from trialcut.record.seal import record_run

ZEROS = "0" * 64


def entry(number: int, **changes) -> dict:
    base = {
        "run_id": f"20261202T1030{number:02d}Z-{number:04x}", "study_id": "STUDY-1",
        "cut": "interim", "created_utc": f"2026-12-02T10:30:{number % 60:02d}Z",
        "folder": f"STUDY-1/interim/run{number}",
        "plan_sha256": hashlib.sha256(b"plan").hexdigest(), "lock_status": "locked",
        "dummy_arms": False, "data_sha256": hashlib.sha256(b"data").hexdigest(),
        "manifest_sha256": hashlib.sha256(f"manifest {number}".encode()).hexdigest(),
    }
    return {**base, **changes}


def independent_row_hash(row: dict) -> str:
    # The documented rule, recomputed here with json + hashlib (Python standard library).
    hashed = {key: value for key, value in row.items() if key != "row_hash"}
    text = json.dumps(hashed, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def raw_rows(registry: Path) -> list[dict]:
    # Read with sqlite3 directly, not through the module under test.
    with sqlite3.connect(registry) as connection:
        connection.row_factory = sqlite3.Row
        return [dict(row) for row in connection.execute("SELECT * FROM records ORDER BY seq")]


def execute(registry: Path, statement: str, *arguments) -> None:
    connection = sqlite3.connect(registry)
    with connection:
        connection.execute(statement, arguments)
    connection.close()


@pytest.fixture
def registry(tmp_path) -> Path:
    path = tmp_path / "registry.sqlite"
    for number in range(1, 5):
        append_run(path, entry(number))
    return path


def test_rows_chain_from_zeros_and_hash_their_own_fields(registry):
    rows = raw_rows(registry)
    assert [row["seq"] for row in rows] == [1, 2, 3, 4]
    assert rows[0]["previous_hash"] == ZEROS
    for before, after in zip(rows, rows[1:]):
        assert after["previous_hash"] == before["row_hash"]
    for row in rows:
        assert row["row_hash"] == independent_row_hash(row)
    assert rows[0]["dummy_arms"] == 0 and rows[0]["lock_status"] == "locked"
    assert verify_chain(registry) == []


def test_list_runs_returns_rows_in_order_and_filters(registry):
    append_run(registry, entry(5, study_id="OTHER", cut="final"))
    assert [row.seq for row in list_runs(registry)] == [1, 2, 3, 4, 5]
    assert [row.seq for row in list_runs(registry, study="OTHER")] == [5]
    assert [row.seq for row in list_runs(registry, study="STUDY-1", cut="interim")] == [1, 2, 3, 4]
    row = list_runs(registry)[0]
    assert row.to_dict() == raw_rows(registry)[0]
    assert find_run(registry, row.record_id) == row
    assert find_run(registry, "no-such-run") is None


def codes(problems) -> list[str]:
    return [problem.code for problem in problems]


def test_an_edited_row_is_named(registry):
    execute(registry, "UPDATE records SET data_sha256 = ? WHERE seq = 2", "f" * 64)
    problems = verify_chain(registry)
    assert codes(problems) == ["registry.row_changed"]
    assert "seq 2" in problems[0].field and entry(2)["run_id"] in problems[0].field


def test_an_edited_row_hash_breaks_the_next_link_too(registry):
    execute(registry, "UPDATE records SET row_hash = ? WHERE seq = 2", "e" * 64)
    found = {(problem.code, problem.field.split(".")[0]) for problem in verify_chain(registry)}
    assert ("registry.row_changed", f"records[seq 2, run {entry(2)['run_id']}]") in found
    assert ("registry.chain_broken", f"records[seq 3, run {entry(3)['run_id']}]") in found


def test_a_deleted_middle_row_is_named(registry):
    execute(registry, "DELETE FROM records WHERE seq = 2")
    problems = verify_chain(registry)
    assert sorted(codes(problems)) == ["registry.chain_broken", "registry.rows_missing"]
    assert all("seq 3" in problem.field for problem in problems)


def test_a_deleted_last_row_is_detected(registry):
    # SQLite keeps the highest AUTOINCREMENT value in sqlite_sequence (sqlite.org/autoinc.html).
    execute(registry, "DELETE FROM records WHERE seq = 4")
    problems = verify_chain(registry)
    assert codes(problems) == ["registry.rows_removed_at_end"]
    # A later append keeps the gap, so the removal cannot be papered over.
    append_run(registry, entry(9))
    assert raw_rows(registry)[-1]["seq"] == 5
    assert "registry.rows_missing" in codes(verify_chain(registry))


def test_swapped_rows_are_detected(registry):
    # Swap the contents of rows 2 and 3 while keeping their seq numbers.
    rows = raw_rows(registry)
    columns = [column for column in rows[0] if column not in ("seq", "record_id")]
    assignments = ", ".join(f"{column} = ?" for column in columns)
    execute(registry, "UPDATE records SET record_id = 'moving-' || seq WHERE seq IN (2, 3)")
    execute(registry, f"UPDATE records SET record_id = ?, {assignments} WHERE seq = 2",
            rows[2]["record_id"], *[rows[2][column] for column in columns])
    execute(registry, f"UPDATE records SET record_id = ?, {assignments} WHERE seq = 3",
            rows[1]["record_id"], *[rows[1][column] for column in columns])
    found = codes(verify_chain(registry))
    assert "registry.chain_broken" in found and "registry.row_changed" in found


def test_renumbered_rows_are_detected(registry):
    execute(registry, "UPDATE records SET seq = 10 WHERE seq = 2")
    execute(registry, "UPDATE records SET seq = 2 WHERE seq = 3")
    execute(registry, "UPDATE records SET seq = 3 WHERE seq = 10")
    assert "registry.row_changed" in codes(verify_chain(registry))


@pytest.mark.parametrize("change, field", [
    ({"lock_status": "maybe"}, "lock_status"), ({"plan_sha256": "abc"}, "plan_sha256"),
    ({"dummy_arms": 2}, "dummy_arms"), ({"created_utc": "yesterday"}, "created_utc"),
    ({"study_id": ""}, "study_id"), ({"surprise": 1}, "surprise"),
])
def test_invalid_entries_are_refused_and_nothing_is_written(tmp_path, change, field):
    path = tmp_path / "registry.sqlite"
    with pytest.raises(TrialcutError) as caught:
        append_run(path, entry(1, **change))
    assert [problem.field for problem in caught.value.problems] == [field]
    assert not path.exists()


def test_duplicate_run_id_is_refused_and_the_chain_stays_whole(registry):
    with pytest.raises(TrialcutError) as caught:
        append_run(registry, entry(1))
    assert caught.value.problems[0].code == "registry.duplicate_record"
    assert len(raw_rows(registry)) == 4 and verify_chain(registry) == []


def test_missing_or_foreign_registry_is_an_input_error(tmp_path):
    with pytest.raises(InputError) as caught:
        verify_chain(tmp_path / "nowhere.sqlite")
    assert caught.value.problems[0].code == "verify.registry_missing"
    foreign = tmp_path / "foreign.sqlite"
    foreign.write_text("not a database at all, just text long enough " * 20)
    with pytest.raises(InputError) as caught:
        list_runs(foreign)
    assert caught.value.problems[0].code == "verify.not_a_registry"


def append_many(registry: str, first: int, count: int, start) -> None:
    start.wait(timeout=60)   # both workers begin together, so their appends interleave
    for number in range(first, first + count):
        append_run(Path(registry), entry(number))


def test_two_processes_appending_at_once_keep_one_chain(tmp_path):
    registry = tmp_path / "registry.sqlite"
    context = multiprocessing.get_context("fork")
    start = context.Event()
    workers = [context.Process(target=append_many, args=(str(registry), first, 25, start))
               for first in (1, 51)]
    for worker in workers:
        worker.start()
    start.set()
    for worker in workers:
        worker.join(timeout=120)
    assert [worker.exitcode for worker in workers] == [0, 0]
    rows = raw_rows(registry)
    assert [row["seq"] for row in rows] == list(range(1, 51))
    assert len({row["previous_hash"] for row in rows}) == 50   # no two rows share a parent
    assert verify_chain(registry) == []


def fill(folder: Path, position) -> None:
    (folder / "results.json").write_text("{}\n")


RUN_ENTRY = {"plan_sha256": "a" * 64, "lock_status": "unlocked", "dummy_arms": True,
             "data_sha256": "b" * 64}


def test_record_run_writes_folder_then_row(tmp_path):
    out = tmp_path / "outputs"
    recorded = record_run(out, out / "registry.sqlite", "S", "c1", "r1", fill, RUN_ENTRY)
    assert recorded.folder == out / "S" / "c1" / "r1"
    row = raw_rows(out / "registry.sqlite")[0]
    assert row["folder"] == "S/c1/r1" and row["dummy_arms"] == 1
    manifest = (recorded.folder / MANIFEST_NAME).read_bytes()
    assert row["manifest_sha256"] == hashlib.sha256(manifest).hexdigest()   # hashlib reference


def test_failed_append_removes_the_new_folder(tmp_path):
    registry = tmp_path / "registry.sqlite"
    record_run(tmp_path / "first", registry, "S", "c1", "r1", fill, RUN_ENTRY)
    # Same run id into another output folder: the folder is written, the append must fail
    # on the registry's UNIQUE run_id, and the folder must go again.
    with pytest.raises(TrialcutError):
        record_run(tmp_path / "second", registry, "S", "c1", "r1", fill, RUN_ENTRY)
    assert list((tmp_path / "second" / "S" / "c1").iterdir()) == []
    assert len(raw_rows(registry)) == 1


def test_interrupted_append_removes_the_new_folder(tmp_path, monkeypatch):
    from trialcut.record.registry import RegistryWriter

    def interrupted(writer, values):
        raise KeyboardInterrupt

    monkeypatch.setattr(RegistryWriter, "append", interrupted)
    with pytest.raises(KeyboardInterrupt):
        record_run(tmp_path, tmp_path / "registry.sqlite", "S", "c1", "r1", fill, RUN_ENTRY)
    assert list((tmp_path / "S" / "c1").iterdir()) == []
    monkeypatch.undo()
    assert list_runs(tmp_path / "registry.sqlite") == []


def test_record_run_refuses_an_entry_that_contradicts_it(tmp_path):
    with pytest.raises(TrialcutError) as caught:
        record_run(tmp_path, tmp_path / "registry.sqlite", "S", "c1", "r1", fill,
                   {**RUN_ENTRY, "cut": "c2"})
    assert caught.value.problems[0].field == "cut"
    assert not list(tmp_path.rglob("*"))
