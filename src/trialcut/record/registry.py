"""The registry: one hash-chained row per sealed folder (run, comparison, rendering, …) in SQLite.

Each row carries ``previous_hash`` (the ``row_hash`` of the row before it; 64 zeros for
the first row) and ``row_hash``, the SHA-256 of the row's canonical serialisation:

    json.dumps({every column except row_hash}, sort_keys=True, separators=(",", ":"),
               ensure_ascii=False).encode("utf-8")

so changing any field of a row, removing a row or reordering rows breaks the chain at a
named place.  ``seq`` is an AUTOINCREMENT key: SQLite's own ``sqlite_sequence`` table
then remembers the highest number ever used, which exposes a removed last row too.  A
chain proves order and integrity, not authorship: whoever can rewrite the whole file can
rebuild a consistent chain.  The sealed folders' own content is therefore compared with
their rows, and a chain head kept *outside* the file (printed by every record, given to
``verify --head``) exposes a rebuilt or shortened chain.

Every row has a ``kind`` (:data:`RECORD_KINDS`).  Run rows fill the run columns
(plan and data hashes, lock status, dummy arms); rows of other kinds may leave them empty
and keep their own facts in ``details`` (canonical JSON text).

Registry format 2 (``PRAGMA user_version = 2``, table ``records``).  A format-1 registry
(table ``runs``, runs only) is read as it is and upgraded in place by the next write: its
rows are copied unchanged and keep ``row_format = 1``, whose hash covers the format-1
fields (with ``run_id`` for ``record_id``), so every old hash still checks.

Writers take the write lock (``BEGIN IMMEDIATE``) before they read the chain's end, and
hold it until the row is committed; a writer that finds the lock held waits, telling the
caller through ``on_wait``, and gives up with :class:`RegistryBusy` (exit 2) after its
patience runs out.
"""
from __future__ import annotations

import hashlib
import json
import os
import re
import sqlite3
import time
from contextlib import closing, contextmanager
from dataclasses import asdict, dataclass, fields
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterator

from trialcut.errors import InputError, Problem, TrialcutError

GENESIS_HASH = "0" * 64
SCHEMA_VERSION = 2
REGISTRY_NAME = "registry.sqlite"
RECORD_KINDS = ("run", "comparison", "rendering", "approval", "qc", "bundle", "simulation")
LOCK_STATUSES = ("locked", "unlocked")
# How long a writer waits for another writer's lock: before an analysis starts, long enough
# for another run to finish rendering and recording (writers hold the lock while they fill
# their folder); longer once a finished analysis waits to be recorded.
EARLY_PATIENCE_SECONDS = 120.0
RECORD_PATIENCE_SECONDS = 600.0
_POLL_SECONDS = 0.5

_SCHEMA = """
CREATE TABLE IF NOT EXISTS records (
    seq             INTEGER PRIMARY KEY AUTOINCREMENT,
    kind            TEXT    NOT NULL,
    record_id       TEXT    NOT NULL UNIQUE,
    study_id        TEXT    NOT NULL,
    cut             TEXT    NOT NULL,
    created_utc     TEXT    NOT NULL,
    folder          TEXT    NOT NULL,
    plan_sha256     TEXT,
    lock_status     TEXT,
    dummy_arms      INTEGER,
    data_sha256     TEXT,
    manifest_sha256 TEXT    NOT NULL,
    details         TEXT    NOT NULL,
    row_format      INTEGER NOT NULL,
    previous_hash   TEXT    NOT NULL,
    row_hash        TEXT    NOT NULL
)
"""
# A format-1 registry read as format 2 (its rows keep their own hash rule: row_format 1).
_FORMAT_1_SELECT = ("SELECT seq, 'run' AS kind, run_id AS record_id, study_id, cut, created_utc, "
                    "folder, plan_sha256, lock_status, dummy_arms, data_sha256, manifest_sha256, "
                    "'{}' AS details, 1 AS row_format, previous_hash, row_hash FROM runs")
_FORMAT_1_FIELDS = ("seq", "run_id", "study_id", "cut", "created_utc", "folder", "plan_sha256",
                    "lock_status", "dummy_arms", "data_sha256", "manifest_sha256",
                    "previous_hash")
_HEX64 = re.compile(r"[0-9a-f]{64}")
_UTC_TIME = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?Z")
_RUN_FIELDS = ("plan_sha256", "lock_status", "dummy_arms", "data_sha256")


class RegistryBusy(InputError):
    """Another writer held the registry longer than this one would wait (exit 2)."""


@dataclass(frozen=True)
class RegistryRow:
    seq: int
    kind: str              # one of RECORD_KINDS
    record_id: str         # the run id for runs; a fresh id of the same form for other kinds
    study_id: str
    cut: str               # the data cut of a run; what other kinds concern ("interim-vs-final")
    created_utc: str
    folder: str            # relative to the registry file's folder, with '/'
    plan_sha256: str | None
    lock_status: str | None    # 'locked' | 'unlocked' (runs)
    dummy_arms: int | None     # 1 when treatment codes were replaced by dummy codes (runs)
    data_sha256: str | None
    manifest_sha256: str   # SHA-256 of the folder's MANIFEST.sha256 file
    details: str           # canonical JSON of the kind's own facts ("{}" when none)
    row_format: int        # 2; 1 for rows kept from a format-1 registry
    previous_hash: str
    row_hash: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def folder_path(self, registry_path: Path) -> Path:
        return Path(registry_path).parent / self.folder

    def details_dict(self) -> dict[str, Any]:
        try:
            found = json.loads(self.details)
        except (TypeError, json.JSONDecodeError):
            return {}
        return found if isinstance(found, dict) else {}

    @property
    def place(self) -> str:
        """How messages name this row: ``records[seq 3, run 2026…]``."""
        return f"records[seq {self.seq}, {self.kind} {self.record_id}]"


COLUMNS = tuple(item.name for item in fields(RegistryRow))


@dataclass(frozen=True)
class ChainPosition:
    """Where the next row goes: its seq and the hash of the row it follows."""

    seq: int
    previous_hash: str


def canonical_json(value: Any) -> str:
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def row_hash(values: dict[str, Any]) -> str:
    """SHA-256 of the canonical serialisation of a row's fields other than row_hash.

    Rows of format 1 (kept from an older registry) hash the format-1 fields only.
    """
    if values.get("row_format") == 1:
        hashed = {key: values["record_id" if key == "run_id" else key] for key in _FORMAT_1_FIELDS}
    else:
        hashed = {key: value for key, value in values.items() if key != "row_hash"}
    return hashlib.sha256(canonical_json(hashed).encode("utf-8")).hexdigest()


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


# --------------------------------------------------------------------------- writing
class RegistryWriter:
    """An open write transaction: the registry is locked until commit or rollback."""

    def __init__(self, connection: sqlite3.Connection, registry_path: Path):
        self.connection = connection
        self.registry_path = Path(registry_path)
        self.committed = False

    def position(self) -> ChainPosition:
        tail = self.connection.execute(
            "SELECT seq, row_hash FROM records ORDER BY seq DESC LIMIT 1").fetchone()
        highest_used = _highest_sequence_used(self.connection, "records")
        # After the last row was removed the next seq still skips its number, so the
        # removal stays visible as a gap instead of being papered over.
        seq = max(highest_used, tail[0] if tail else 0) + 1
        return ChainPosition(seq=seq, previous_hash=tail[1] if tail else GENESIS_HASH)

    def append(self, entry: dict[str, Any]) -> RegistryRow:
        values = _checked_entry(entry)
        position = self.position()
        hashed = {**values, "row_format": SCHEMA_VERSION, "seq": position.seq,
                  "previous_hash": position.previous_hash}
        row = RegistryRow(**hashed, row_hash=row_hash(hashed))
        _insert(self.connection, row)
        return row

    def rows(self) -> list[RegistryRow]:
        return [_row(record) for record in
                self.connection.execute("SELECT * FROM records ORDER BY seq").fetchall()]

    def commit(self) -> None:
        self.connection.execute("COMMIT")
        self.committed = True


@contextmanager
def registry_writer(registry_path: Path, *, patience: float | None = None,
                    on_wait: Callable[[float], None] | None = None) -> Iterator[RegistryWriter]:
    """Lock the registry for writing (creating or upgrading it); roll back unless committed.

    ``patience`` defaults to RECORD_PATIENCE_SECONDS (read when called, so tests can shorten it).
    """
    patience = RECORD_PATIENCE_SECONDS if patience is None else patience
    path = Path(registry_path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with closing(_connect(path, timeout=_POLL_SECONDS)) as connection:
        _begin_write(connection, path, patience, on_wait)
        writer = RegistryWriter(connection, path)
        try:
            _prepare_schema(connection, path)
            yield writer
        except sqlite3.OperationalError as error:
            if "readonly" in str(error) or "read-only" in str(error):
                raise _unwritable(path, error) from error
            raise
        finally:
            if connection.in_transaction:
                connection.execute("ROLLBACK")


def check_writable(registry_path: Path, *, patience: float | None = None,
                   on_wait: Callable[[float], None] | None = None) -> None:
    """Fail now (exit 2) if a run could not be recorded later: locked, unwritable or too new.

    Writes nothing: a missing registry is only checked for a writable folder to go in.
    ``patience`` defaults to EARLY_PATIENCE_SECONDS.
    """
    patience = EARLY_PATIENCE_SECONDS if patience is None else patience
    path = Path(registry_path)
    if not path.exists():
        _require_writable_folder(path)
        return
    if not os.access(path, os.W_OK):
        raise _unwritable(path, PermissionError(f"{path} is read-only"))
    with closing(_connect(path, timeout=_POLL_SECONDS)) as connection:
        _begin_write(connection, path, patience, on_wait)
        try:
            _registry_format(connection, path)
        finally:
            connection.execute("ROLLBACK")


def append_record(registry_path: Path, entry: dict[str, Any], *,
                  patience: float | None = None,
                  on_wait: Callable[[float], None] | None = None) -> RegistryRow:
    """Append one row (the registry is created if missing) and return it.

    For a sealed folder use :func:`trialcut.record.seal.record_folder`, which writes the
    folder and its row in the right order; this is the bare append.
    """
    _checked_entry(entry)   # a wrong entry is refused before the registry is touched
    with registry_writer(registry_path, patience=patience, on_wait=on_wait) as writer:
        row = writer.append(entry)
        writer.commit()
    return row


def append_run(registry_path: Path, entry: dict[str, Any]) -> RegistryRow:
    """Append a run row: ``entry`` holds the run fields, ``run_id`` naming the record."""
    entry = dict(entry)
    entry["record_id"] = entry.pop("run_id", entry.get("record_id"))
    return append_record(registry_path, {"kind": "run", **entry})


def _begin_write(connection: sqlite3.Connection, path: Path, patience: float,
                 on_wait: Callable[[float], None] | None) -> None:
    started = time.monotonic()
    while True:
        try:
            connection.execute("BEGIN IMMEDIATE")
            return
        except sqlite3.OperationalError as error:
            if "locked" not in str(error) and "busy" not in str(error):
                raise _unwritable(path, error) from error
            waited = time.monotonic() - started
            if waited >= patience:
                raise _busy(path, waited) from error
            if on_wait is not None:
                on_wait(waited)
        except sqlite3.DatabaseError as error:
            raise _not_a_registry(path, error) from error


def _busy(path: Path, waited: float) -> RegistryBusy:
    return RegistryBusy(
        f"the registry {path} is held by another writer",
        [Problem(code="record.registry_busy", file=str(path),
                 message=f"another process kept the registry locked for {waited:.0f} s",
                 expected="a registry free to record this run",
                 got="a registry locked by another trialcut or another program",
                 hint="wait for the other run to finish (see 'trialcut history'), close any "
                      "program that has registry.sqlite open for writing, then start again")])


def _unwritable(path: Path, error: Exception) -> InputError:
    return InputError(
        f"the registry {path} cannot be written",
        [Problem(code="record.registry_unwritable", file=str(path),
                 message="the registry file or its folder is not writable",
                 got=f"{type(error).__name__}: {error}",
                 hint="choose another output folder with --out, or fix its permissions")])


def _require_writable_folder(path: Path) -> None:
    folder = path.parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    if not folder.is_dir() or not os.access(folder, os.W_OK | os.X_OK):
        raise _unwritable(path, PermissionError(f"{folder} is not a writable folder"))


def _prepare_schema(connection: sqlite3.Connection, path: Path) -> None:
    version = _registry_format(connection, path)
    if version == 0:
        connection.execute(_SCHEMA)
    elif version == 1:
        _upgrade_format_1(connection)
    connection.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")


def _registry_format(connection: sqlite3.Connection, path: Path) -> int:
    """0 for an empty file, else the registry format; refuses a format this code cannot read."""
    try:
        tables = {name for (name,) in connection.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table'")}
        version = connection.execute("PRAGMA user_version").fetchone()[0]
    except sqlite3.DatabaseError as error:
        raise _not_a_registry(path, error) from error
    if "records" in tables and version == SCHEMA_VERSION:
        return SCHEMA_VERSION
    if "runs" in tables and "records" not in tables and version in (0, 1):
        return 1
    if not tables - {"sqlite_sequence"} and version == 0:
        return 0
    if version > SCHEMA_VERSION:
        raise InputError(f"{path} was written by a newer trialcut", [Problem(
            code="record.registry_too_new", file=str(path),
            message=f"this registry has format {version}; this trialcut reads formats 1 "
                    f"and {SCHEMA_VERSION}",
            hint="use the trialcut version that wrote it, or write to another output folder")])
    raise _not_a_registry(path, ValueError(f"tables {sorted(tables)}, format {version}"))


def _upgrade_format_1(connection: sqlite3.Connection) -> None:
    # Rows are copied unchanged (row_format 1 keeps their hash rule); the highest seq ever
    # used moves along, so a last row deleted before the upgrade still shows.
    highest_used = _highest_sequence_used(connection, "runs")
    connection.execute(_SCHEMA)
    connection.execute(f"INSERT INTO records ({', '.join(COLUMNS)}) {_FORMAT_1_SELECT}")
    connection.execute("DROP TABLE runs")
    connection.execute("DELETE FROM sqlite_sequence WHERE name IN ('runs', 'records')")
    last = connection.execute("SELECT MAX(seq) FROM records").fetchone()[0] or 0
    if max(highest_used, last):
        connection.execute("INSERT INTO sqlite_sequence (name, seq) VALUES ('records', ?)",
                           [max(highest_used, last)])


def _highest_sequence_used(connection: sqlite3.Connection, table: str) -> int:
    try:
        found = connection.execute("SELECT seq FROM sqlite_sequence WHERE name = ?",
                                   [table]).fetchone()
    except sqlite3.OperationalError:   # no AUTOINCREMENT table yet
        return 0
    return int(found[0]) if found else 0


def _insert(connection: sqlite3.Connection, row: RegistryRow) -> None:
    placeholders = ", ".join("?" for _ in COLUMNS)
    try:
        connection.execute(f"INSERT INTO records ({', '.join(COLUMNS)}) VALUES ({placeholders})",
                           [getattr(row, column) for column in COLUMNS])
    except sqlite3.IntegrityError as error:
        raise TrialcutError(
            f"the registry already has a record with id {row.record_id!r}",
            [Problem(code="registry.duplicate_record", field="record_id", got=row.record_id,
                     message="every record id appears once in the registry",
                     hint="start again: a new record gets a new id")]) from error


# --------------------------------------------------------------------------- entries
def _checked_entry(entry: dict[str, Any]) -> dict[str, Any]:
    """Validate an entry; a wrong entry is a programming fault (exit 3)."""
    fixed = {"seq", "previous_hash", "row_hash", "row_format"}
    allowed = set(COLUMNS) - fixed
    values = {"created_utc": utc_now(), "details": {}, **entry}
    required = {"kind", "record_id", "study_id", "cut", "created_utc", "folder",
                "manifest_sha256"} | (set(_RUN_FIELDS) if values.get("kind") == "run" else set())
    problems = [Problem(code="registry.entry_field", field=key, message="unknown entry field",
                        expected=", ".join(sorted(allowed)), got=key)
                for key in sorted(set(values) - allowed)]
    problems += [Problem(code="registry.entry_field", field=key, message="missing entry field")
                 for key in sorted(required - set(values))]
    if not problems:
        problems += _field_problems(values)
    if problems:
        raise TrialcutError("a registry entry is not complete and valid", problems)
    if values.get("dummy_arms") is not None:
        values["dummy_arms"] = int(values["dummy_arms"])
    if not isinstance(values["details"], str):
        values["details"] = canonical_json(values["details"])
    return {key: values.get(key) for key in COLUMNS if key in allowed}


def _field_problems(values: dict[str, Any]) -> list[Problem]:
    def problem(key: str, expected: str) -> Problem:
        return Problem(code="registry.entry_field", field=key, message="invalid entry field",
                       expected=expected, got=repr(values[key]))

    found = [problem(key, "non-empty text") for key in ("record_id", "study_id", "folder")
             if not isinstance(values[key], str) or not values[key]]
    if not isinstance(values["cut"], str):
        found.append(problem("cut", "text"))
    if values["kind"] not in RECORD_KINDS:
        found.append(problem("kind", " or ".join(RECORD_KINDS)))
    found += [problem(key, "64 lower-case hex digits")
              for key in ("plan_sha256", "data_sha256", "manifest_sha256")
              if values.get(key) is not None
              and (not isinstance(values[key], str) or not _HEX64.fullmatch(values[key]))]
    if values.get("lock_status") is not None and values["lock_status"] not in LOCK_STATUSES:
        found.append(problem("lock_status", " or ".join(LOCK_STATUSES)))
    dummy = values.get("dummy_arms")
    if dummy is not None and (dummy not in (0, 1) or isinstance(dummy, float)):
        found.append(problem("dummy_arms", "True/False or 0/1"))
    if not isinstance(values["created_utc"], str) or not _UTC_TIME.fullmatch(values["created_utc"]):
        found.append(problem("created_utc", "UTC time like 2026-12-02T10:30:15Z"))
    if not isinstance(values["details"], (dict, str)):
        found.append(problem("details", "a mapping of JSON values"))
    return found


# --------------------------------------------------------------------------- reading
def list_records(registry_path: Path, study: str | None = None, cut: str | None = None,
                 kind: str | None = None) -> list[RegistryRow]:
    """Rows in seq order, optionally of one study, cut and/or kind."""
    conditions, arguments = [], []
    for column, value in (("study_id", study), ("cut", cut), ("kind", kind)):
        if value is not None:
            conditions.append(f"{column} = ?")
            arguments.append(value)
    where = (" WHERE " + " AND ".join(conditions)) if conditions else ""
    with closing(open_registry(registry_path)) as connection:
        source = _source(connection, registry_path)
        query = f"SELECT * FROM ({source}){where} ORDER BY seq"
        return [_row(record) for record in _read(connection, registry_path, query, arguments)]


def list_runs(registry_path: Path, study: str | None = None,
              cut: str | None = None) -> list[RegistryRow]:
    """Run rows in seq order, optionally of one study and/or cut."""
    return list_records(registry_path, study=study, cut=cut, kind="run")


def find_record(registry_path: Path, record_id: str) -> RegistryRow | None:
    """The row of ``record_id``; None means "not registered", an answer rather than a failure."""
    found = [row for row in list_records(registry_path) if row.record_id == record_id]
    return found[0] if found else None


find_run = find_record


def chain_head(registry_path: Path) -> ChainPosition:
    """The newest row's seq and hash (seq 0 and 64 zeros for an empty registry)."""
    rows = list_records(registry_path)
    return ChainPosition(rows[-1].seq, rows[-1].row_hash) if rows else ChainPosition(0, GENESIS_HASH)


def verify_chain(registry_path: Path) -> list[Problem]:
    """Every break in the registry's chain, each naming the row by seq, kind and id."""
    with closing(open_registry(registry_path)) as connection:
        source = _source(connection, registry_path)
        records = _read(connection, registry_path, f"SELECT * FROM ({source}) ORDER BY seq", [])
        table = "records" if "FROM runs" not in source else "runs"
        highest_used = _highest_sequence_used(connection, table)
    problems: list[Problem] = []
    expected_seq, expected_previous = 1, GENESIS_HASH
    for record in records:
        problems += _row_problems(_row(record), expected_seq, expected_previous, str(registry_path))
        expected_seq, expected_previous = record["seq"] + 1, record["row_hash"]
    last_seq = records[-1]["seq"] if records else 0
    if highest_used > last_seq:
        problems.append(Problem(
            code="registry.rows_removed_at_end", file=str(registry_path),
            field=f"records[seq {_seq_range(last_seq + 1, highest_used)}]",
            message=f"rows up to seq {highest_used} were recorded but the last row now is "
                    f"seq {last_seq}: the latest rows were deleted",
            hint=RESTORE_HINT))
    return problems


def known_head_problems(registry_path: Path, head: str) -> tuple[list[Problem], list[RegistryRow]]:
    """Is ``head`` (a row hash kept outside the registry) still in the chain?

    Returns the problems and the rows recorded after it.  A head that is gone means rows
    at or before it were removed or rewritten: the file alone could not show that.
    """
    rows = list_records(registry_path)
    wanted = head.strip().lower()
    if wanted == GENESIS_HASH:
        return [], rows
    for index, row in enumerate(rows):
        if row.row_hash == wanted:
            return [], rows[index + 1:]
    return [Problem(
        code="registry.known_head_missing", file=str(registry_path), field="--head",
        message="the chain head you kept is no longer in the registry: rows up to it were "
                "removed, or the chain was rebuilt after a change",
        expected=f"a row whose row_hash is {wanted}",
        got=f"{len(rows)} row(s), newest {rows[-1].row_hash if rows else GENESIS_HASH}",
        hint=RESTORE_HINT)], []


def _seq_range(first: int, last: int) -> str:
    return str(first) if first == last else f"{first} to {last}"


RESTORE_HINT = ("restore registry.sqlite from a trusted backup and find out who changed it; "
                "do not hand out results whose registry does not verify")


def _row_problems(row: RegistryRow, expected_seq: int, expected_previous: str,
                  source: str) -> list[Problem]:
    problems = []
    if row.seq != expected_seq:
        problems.append(Problem(
            code="registry.rows_missing", file=source, field=row.place,
            message="rows are missing before this one: a row was deleted or renumbered",
            expected=f"seq {expected_seq}", got=f"seq {row.seq}", hint=RESTORE_HINT))
    if row.previous_hash != expected_previous:
        problems.append(Problem(
            code="registry.chain_broken", file=source, field=f"{row.place}.previous_hash",
            message="this row does not follow the row before it: rows were deleted, "
                    "inserted or reordered",
            expected=expected_previous, got=str(row.previous_hash), hint=RESTORE_HINT))
    recomputed = row_hash(row.to_dict())
    if row.row_hash != recomputed:
        problems.append(Problem(
            code="registry.row_changed", file=source, field=row.place,
            message="this registry row was changed after it was recorded (its fields no "
                    "longer match its row_hash)",
            expected=f"fields that hash to the stored row_hash {row.row_hash}",
            got=f"fields that hash to {recomputed}", hint=RESTORE_HINT))
    if row.row_format == 1 and (row.kind != "run" or row.details != "{}"):
        problems.append(Problem(
            code="registry.row_changed", file=source, field=row.place,
            message="a row kept from a format-1 registry must be a run without details",
            got=f"kind {row.kind!r}, details {row.details}", hint=RESTORE_HINT))
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


def _source(connection: sqlite3.Connection, registry_path: Path) -> str:
    """The rows to read: the records table, or a format-1 registry's runs seen as records."""
    version = _registry_format(connection, Path(registry_path))
    if version == 0:   # created by a writer that was stopped before its first row: empty
        return "SELECT " + ", ".join(f"NULL AS {column}" for column in COLUMNS) + " WHERE 0"
    return "SELECT * FROM records" if version == SCHEMA_VERSION else _FORMAT_1_SELECT


def _connect(target: Any, uri: bool = False, timeout: float = 60.0) -> sqlite3.Connection:
    connection = sqlite3.connect(target, timeout=timeout, isolation_level=None, uri=uri)
    connection.row_factory = sqlite3.Row
    return connection


def _not_a_registry(path: Path, error: Exception) -> InputError:
    return InputError(
        f"{path} is not a trialcut registry",
        [Problem(code="verify.not_a_registry", file=str(path),
                 message="the file could not be read as a registry",
                 expected="a SQLite file with a 'records' table (or an older 'runs' table)",
                 got=f"{type(error).__name__}: {error}",
                 hint="pass the registry.sqlite of the output folder with --registry")])


def _read(connection: sqlite3.Connection, registry_path: Path, query: str,
          arguments: list[Any]) -> list[sqlite3.Row]:
    try:
        return connection.execute(query, arguments).fetchall()
    except sqlite3.DatabaseError as error:
        raise _not_a_registry(Path(registry_path), error) from error


def _row(record: sqlite3.Row) -> RegistryRow:
    return RegistryRow(**{column: record[column] for column in COLUMNS})
