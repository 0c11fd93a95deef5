"""The run registry: one hash-chained row per recorded run, in a SQLite file.

Each row carries ``previous_hash`` (the ``row_hash`` of the row before it; 64 zeros for
the first row) and ``row_hash``, the SHA-256 of the row's canonical serialisation:

    json.dumps({every column except row_hash}, sort_keys=True, separators=(",", ":"),
               ensure_ascii=False).encode("utf-8")

so changing any field of a row, removing a row or reordering rows breaks the chain at a
named place.  ``seq`` is an AUTOINCREMENT key: SQLite's own ``sqlite_sequence`` table
then remembers the highest number ever used, which exposes a removed last row too.  A
chain proves order and integrity, not authorship: whoever can rewrite the whole file can
rebuild a consistent chain, which is why the run folders' manifests are checked as well.

``record_run`` writes a run folder and then appends its row; if the append fails the new
folder is removed again, so a run is either fully recorded or absent, never a folder
without its row (a row always points at a complete folder, since folders appear whole).

Appends run inside ``BEGIN IMMEDIATE`` (the write lock is taken before the last row is
read), so two processes appending at once still produce one unbroken chain.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import sqlite3
from contextlib import closing
from dataclasses import asdict, dataclass, fields
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

from trialcut.errors import InputError, Problem, TrialcutError
from trialcut.record.manifest import MANIFEST_NAME, sha256_file
from trialcut.record.runfolder import write_run_folder

GENESIS_HASH = "0" * 64
SCHEMA_VERSION = 1
LOCK_STATUSES = ("locked", "unlocked")
BUSY_TIMEOUT_SECONDS = 60.0

_SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    seq             INTEGER PRIMARY KEY AUTOINCREMENT,
    run_id          TEXT    NOT NULL UNIQUE,
    study_id        TEXT    NOT NULL,
    cut             TEXT    NOT NULL,
    created_utc     TEXT    NOT NULL,
    folder          TEXT    NOT NULL,
    plan_sha256     TEXT    NOT NULL,
    lock_status     TEXT    NOT NULL,
    dummy_arms      INTEGER NOT NULL,
    data_sha256     TEXT    NOT NULL,
    manifest_sha256 TEXT    NOT NULL,
    previous_hash   TEXT    NOT NULL,
    row_hash        TEXT    NOT NULL
)
"""
_HEX64 = re.compile(r"[0-9a-f]{64}")
_UTC_TIME = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?Z")
_ENTRY_TEXT_FIELDS = ("run_id", "study_id", "cut", "folder")
_ENTRY_HASH_FIELDS = ("plan_sha256", "data_sha256", "manifest_sha256")


@dataclass(frozen=True)
class RegistryRow:
    seq: int
    run_id: str
    study_id: str
    cut: str
    created_utc: str
    folder: str            # relative to the registry file's folder, with '/'
    plan_sha256: str
    lock_status: str       # 'locked' | 'unlocked'
    dummy_arms: int        # 1 when treatment codes were replaced by dummy codes
    data_sha256: str
    manifest_sha256: str   # SHA-256 of the run folder's MANIFEST.sha256 file
    previous_hash: str
    row_hash: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def folder_path(self, registry_path: Path) -> Path:
        return Path(registry_path).parent / self.folder


COLUMNS = tuple(item.name for item in fields(RegistryRow))


def row_hash(values: dict[str, Any]) -> str:
    """SHA-256 of the canonical serialisation of a row's fields other than row_hash."""
    hashed = {key: value for key, value in values.items() if key != "row_hash"}
    text = json.dumps(hashed, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def append_run(registry_path: Path, entry: dict[str, Any]) -> RegistryRow:
    """Append one run to the registry (created if missing) and return the stored row.

    ``entry`` holds run_id, study_id, cut, folder, plan_sha256, lock_status, dummy_arms,
    data_sha256, manifest_sha256 and optionally created_utc (default: now).
    """
    values = _checked_entry(entry)
    Path(registry_path).parent.mkdir(parents=True, exist_ok=True)
    with closing(_connect(registry_path)) as connection:
        connection.execute("BEGIN IMMEDIATE")
        try:
            connection.execute(_SCHEMA)
            connection.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
            row = _chained_row(connection, values)
            _insert(connection, row)
            connection.execute("COMMIT")
        except BaseException:
            if connection.in_transaction:
                connection.execute("ROLLBACK")
            raise
    return row


def _chained_row(connection: sqlite3.Connection, values: dict[str, Any]) -> RegistryRow:
    tail = connection.execute("SELECT seq, row_hash FROM runs ORDER BY seq DESC LIMIT 1").fetchone()
    highest_used = _highest_sequence_used(connection)
    previous_hash = tail[1] if tail else GENESIS_HASH
    # After the last row was removed the next seq still skips its number, so the removal
    # stays visible as a gap instead of being papered over.
    seq = max(highest_used, tail[0] if tail else 0) + 1
    hashed = {**values, "seq": seq, "previous_hash": previous_hash}
    return RegistryRow(**hashed, row_hash=row_hash(hashed))


_HIGHEST_USED = "SELECT seq FROM sqlite_sequence WHERE name = 'runs'"


def _highest_sequence_used(connection: sqlite3.Connection) -> int:
    found = connection.execute(_HIGHEST_USED).fetchone()
    return int(found[0]) if found else 0


def _insert(connection: sqlite3.Connection, row: RegistryRow) -> None:
    placeholders = ", ".join("?" for _ in COLUMNS)
    try:
        connection.execute(f"INSERT INTO runs ({', '.join(COLUMNS)}) VALUES ({placeholders})",
                           [getattr(row, column) for column in COLUMNS])
    except sqlite3.IntegrityError as error:
        raise TrialcutError(
            f"the registry already has a run with id {row.run_id!r}",
            [Problem(code="registry.duplicate_run", field="run_id", got=row.run_id,
                     message="every run id appears once in the registry",
                     hint="start the run again: it will get a new id")]) from error


def _checked_entry(entry: dict[str, Any]) -> dict[str, Any]:
    """Validate a registry entry; wrong entries are a programming fault (exit 3)."""
    expected = set(COLUMNS) - {"seq", "previous_hash", "row_hash"}
    values = {"created_utc": utc_now(), **entry}
    problems = [Problem(code="registry.entry_field", field=key, message="unknown entry field",
                        expected=", ".join(sorted(expected)), got=key)
                for key in sorted(set(values) - expected)]
    problems += [Problem(code="registry.entry_field", field=key, message="missing entry field")
                 for key in sorted(expected - set(values))]
    if not problems:
        problems += _field_problems(values)
    if problems:
        raise TrialcutError("a registry entry is not complete and valid", problems)
    values["dummy_arms"] = int(values["dummy_arms"])
    return {key: values[key] for key in COLUMNS if key in expected}


def _field_problems(values: dict[str, Any]) -> list[Problem]:
    def problem(key: str, expected: str) -> Problem:
        return Problem(code="registry.entry_field", field=key, message="invalid entry field",
                       expected=expected, got=repr(values[key]))

    found = [problem(key, "non-empty text") for key in _ENTRY_TEXT_FIELDS
             if not isinstance(values[key], str) or not values[key]]
    found += [problem(key, "64 lower-case hex digits") for key in _ENTRY_HASH_FIELDS
              if not isinstance(values[key], str) or not _HEX64.fullmatch(values[key])]
    if values["lock_status"] not in LOCK_STATUSES:
        found.append(problem("lock_status", " or ".join(LOCK_STATUSES)))
    if values["dummy_arms"] not in (0, 1) or isinstance(values["dummy_arms"], float):
        found.append(problem("dummy_arms", "True/False or 0/1"))
    if not isinstance(values["created_utc"], str) or not _UTC_TIME.fullmatch(values["created_utc"]):
        found.append(problem("created_utc", "UTC time like 2026-12-02T10:30:15Z"))
    return found


def list_runs(registry_path: Path, study: str | None = None,
              cut: str | None = None) -> list[RegistryRow]:
    """Rows in seq order, optionally of one study and/or cut."""
    query, arguments = "SELECT * FROM runs", []
    conditions = []
    if study is not None:
        conditions.append("study_id = ?")
        arguments.append(study)
    if cut is not None:
        conditions.append("cut = ?")
        arguments.append(cut)
    if conditions:
        query += " WHERE " + " AND ".join(conditions)
    with closing(open_registry(registry_path)) as connection:
        return [_row(record) for record in _read(connection, registry_path, query + " ORDER BY seq",
                                                 arguments)]


def find_run(registry_path: Path, run_id: str) -> RegistryRow | None:
    """The row of ``run_id``; None means "not registered", an answer rather than a failure."""
    with closing(open_registry(registry_path)) as connection:
        found = _read(connection, registry_path, "SELECT * FROM runs WHERE run_id = ?", [run_id])
    return _row(found[0]) if found else None


def verify_chain(registry_path: Path) -> list[Problem]:
    """Every break in the registry's chain, each naming the row by seq and run id."""
    with closing(open_registry(registry_path)) as connection:
        records = _read(connection, registry_path, "SELECT * FROM runs ORDER BY seq", [])
        highest_used = _read(connection, registry_path, _HIGHEST_USED, [])
    problems: list[Problem] = []
    expected_seq, expected_previous = 1, GENESIS_HASH
    for record in records:
        problems += _row_problems(dict(record), expected_seq, expected_previous, str(registry_path))
        expected_seq, expected_previous = record["seq"] + 1, record["row_hash"]
    last_seq = records[-1]["seq"] if records else 0
    highest_used = int(highest_used[0][0]) if highest_used else 0
    if highest_used > last_seq:
        problems.append(Problem(
            code="registry.rows_removed_at_end", file=str(registry_path),
            field=f"runs[seq {_seq_range(last_seq + 1, highest_used)}]",
            message=f"rows up to seq {highest_used} were recorded but the last row now is "
                    f"seq {last_seq}: the latest rows were deleted",
            hint=_RESTORE_HINT))
    return problems


def _seq_range(first: int, last: int) -> str:
    return str(first) if first == last else f"{first} to {last}"


_RESTORE_HINT = ("restore registry.sqlite from a trusted backup and find out who changed it; "
                 "do not hand out results whose registry does not verify")


def _row_problems(record: dict[str, Any], expected_seq: int, expected_previous: str,
                  source: str) -> list[Problem]:
    where = f"runs[seq {record['seq']}, run {record['run_id']}]"
    problems = []
    if record["seq"] != expected_seq:
        problems.append(Problem(
            code="registry.rows_missing", file=source, field=where,
            message="rows are missing before this one: a row was deleted or renumbered",
            expected=f"seq {expected_seq}", got=f"seq {record['seq']}", hint=_RESTORE_HINT))
    if record["previous_hash"] != expected_previous:
        problems.append(Problem(
            code="registry.chain_broken", file=source, field=f"{where}.previous_hash",
            message="this row does not follow the row before it: rows were deleted, "
                    "inserted or reordered",
            expected=expected_previous, got=str(record["previous_hash"]), hint=_RESTORE_HINT))
    recomputed = row_hash(record)
    if record["row_hash"] != recomputed:
        problems.append(Problem(
            code="registry.row_changed", file=source, field=where,
            message="this registry row was changed after it was recorded (its fields no "
                    "longer match its row_hash)",
            expected=f"fields that hash to the stored row_hash {record['row_hash']}",
            got=f"fields that hash to {recomputed}", hint=_RESTORE_HINT))
    return problems


def open_registry(registry_path: Path) -> sqlite3.Connection:
    """Open an existing registry for reading; a missing file is an InputError."""
    path = Path(registry_path)
    if not path.is_file():
        raise InputError(
            f"no registry at {path}",
            [Problem(code="verify.registry_missing", file=str(path),
                     message="the registry file does not exist",
                     expected="the registry.sqlite written by a run (by default "
                              "outputs/registry.sqlite)",
                     got="no such file",
                     hint="pass the registry of the output folder the run was written to "
                          "with --registry")])
    # Read-only through a URI so that checking a registry can never create or alter one.
    return _connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)


def _connect(target: Any, uri: bool = False) -> sqlite3.Connection:
    connection = sqlite3.connect(target, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None,
                                 uri=uri)
    connection.row_factory = sqlite3.Row
    return connection


def _read(connection: sqlite3.Connection, registry_path: Path, query: str,
          arguments: list[Any]) -> list[sqlite3.Row]:
    try:
        return connection.execute(query, arguments).fetchall()
    except sqlite3.DatabaseError as error:
        raise InputError(
            f"{registry_path} is not a trialcut registry",
            [Problem(code="verify.not_a_registry", file=str(registry_path),
                     message="the file could not be read as a registry",
                     expected="a SQLite file with a 'runs' table",
                     got=f"{type(error).__name__}: {error}",
                     hint="pass the registry.sqlite of the output folder with --registry")]
        ) from error


def _row(record: sqlite3.Row) -> RegistryRow:
    return RegistryRow(**{column: record[column] for column in COLUMNS})


# Fields record_run fills itself; an entry may repeat them only with the same value.
_FILLED_HERE = ("run_id", "study_id", "cut", "folder", "manifest_sha256")


@dataclass(frozen=True)
class RecordedRun:
    folder: Path
    row: RegistryRow

    def to_dict(self) -> dict[str, Any]:
        return {"folder": str(self.folder), "row": self.row.to_dict()}


def record_run(out_root: Path, registry_path: Path, study_id: str, cut: str, run_id: str,
               write: Callable[[Path], None], entry: dict[str, Any]) -> RecordedRun:
    """Write the run folder with ``write`` and append its registry row.

    ``entry`` gives plan_sha256, lock_status, dummy_arms, data_sha256 and optionally
    created_utc; the run's names, its folder (relative to the registry's folder) and the
    manifest hash are filled in here.
    """
    folder = write_run_folder(out_root, study_id, cut, run_id, write)
    try:
        filled = {"run_id": run_id, "study_id": study_id, "cut": cut,
                  "folder": _relative_folder(folder, Path(registry_path)),
                  "manifest_sha256": sha256_file(folder / MANIFEST_NAME)}
        _refuse_conflicts(entry, filled)
        row = append_run(registry_path, {**entry, **filled})
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    return RecordedRun(folder=folder, row=row)


def _relative_folder(folder: Path, registry_path: Path) -> str:
    # Relative, so that the output folder can be moved or copied whole and still verify.
    relative = os.path.relpath(folder.resolve(), registry_path.parent.resolve())
    return Path(relative).as_posix()


def _refuse_conflicts(entry: dict[str, Any], filled: dict[str, Any]) -> None:
    problems = [Problem(code="registry.entry_field", field=key,
                        message="record_run fills this field itself",
                        expected=repr(filled[key]), got=repr(entry[key]))
                for key in _FILLED_HERE if key in entry and entry[key] != filled[key]]
    if problems:
        raise TrialcutError("a registry entry disagrees with the run being recorded", problems)
