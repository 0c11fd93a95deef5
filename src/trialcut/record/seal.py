"""Sealing a folder and recording it: the one way a run, comparison, rendering… is kept.

``record_folder`` keeps this order, so that no interruption can leave a complete-looking
folder without its registry row:

1. take the registry's write lock (waiting with ``on_wait`` while another writer holds it);
2. fill a hidden temporary folder ``.tmp-<id>-<pid>-<random>`` (``write`` gets the chain
   position the new row will take, so a report can print the chain head it follows);
3. write MANIFEST.sha256 and flush everything to disk;
4. append the row, then — with Ctrl-C and SIGTERM held back for these two steps — commit
   it and rename the temporary folder into place.

Killed (SIGKILL, power loss) before the commit: a hidden temporary folder and no row; it
is not a record, ``verify`` and ``history`` name it, and the next write removes it.
Killed between the commit and the rename: a row whose folder is still hidden under its
temporary name; the next write checks that folder against the row's manifest hash and
moves it into place, and ``verify`` reports it until then.  A visible folder therefore
always has its row.

Records of kinds other than ``run`` also get ``record.json`` (kind, id, study, cut, creation
time and details: exactly the row's fields), so ``verify`` can compare the row with the
sealed folder for every kind.
"""
from __future__ import annotations

import json
import os
import shutil
import signal
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

from trialcut.errors import Problem, TrialcutError
from trialcut.record.manifest import MANIFEST_NAME, sha256_file
from trialcut.record.registry import (REGISTRY_NAME, ChainPosition,
                                      RegistryRow, RegistryWriter, registry_writer, utc_now)
from trialcut.record.runfolder import (find_temporaries, make_parent, make_temporary,
                                       parse_temporary_name, process_alive, refuse_existing,
                                       safe_folder_name, seal_temporary, _sync_directory)

RECORD_FILE = "record.json"
# A temporary folder whose row is committed but which is still hidden may belong to a
# writer between its commit and its rename: leave it alone for this long.
_RENAME_GRACE_SECONDS = 60.0

Write = Callable[[Path, ChainPosition], None]


@dataclass(frozen=True)
class RecordedFolder:
    folder: Path
    row: RegistryRow

    @property
    def head(self) -> str:
        """The registry's chain head after this record: keep it somewhere else."""
        return self.row.row_hash

    def to_dict(self) -> dict[str, Any]:
        return {"folder": str(self.folder), "row": self.row.to_dict()}


RecordedRun = RecordedFolder


def record_folder(out_root: Path, *, kind: str, study_id: str, group: str, record_id: str,
                  write: Write, entry: dict[str, Any] | None = None,
                  registry_path: Path | None = None, patience: float | None = None,
                  on_wait: Callable[[float], None] | None = None) -> RecordedFolder:
    """Seal ``<out_root>/<study_id>/<group>/<record_id>/`` filled by ``write`` and register it.

    ``entry`` gives the row's other fields: ``cut`` (default: the group), ``details`` (a
    JSON-able mapping of the kind's own facts), ``created_utc`` and, for runs,
    ``plan_sha256``, ``lock_status``, ``dummy_arms`` and ``data_sha256``.  The folder,
    its manifest hash and the chain fields are filled in here.
    """
    out_root = Path(out_root)
    registry_path = Path(registry_path) if registry_path is not None else out_root / REGISTRY_NAME
    parent = out_root / safe_folder_name(study_id, "study id") / safe_folder_name(group, "group")
    final = parent / safe_folder_name(record_id, "record id")
    make_parent(parent)
    refuse_existing(final)
    values = {"cut": group, "created_utc": utc_now(), **(entry or {}), "kind": kind,
              "record_id": record_id, "study_id": study_id,
              "folder": _relative_folder(final, registry_path)}
    with registry_writer(registry_path, patience=patience, on_wait=on_wait) as writer:
        tidy_leftovers(out_root, writer)
        row = _seal_and_append(writer, parent, final, values, write)
    try:
        _sync_directory(parent)   # makes the new name itself durable
    except OSError:
        pass   # the row and the folder exist; the name reaches the disk with the next sync
    return RecordedFolder(folder=final, row=row)


def _seal_and_append(writer: RegistryWriter, parent: Path, final: Path,
                     values: dict[str, Any], write: Write) -> RegistryRow:
    refuse_existing(final)
    position = writer.position()
    temporary = make_temporary(parent, values["record_id"])
    try:
        write(temporary, position)
        if values["kind"] != "run":
            _write_record_file(temporary, values, position)
        seal_temporary(temporary)
        refuse_existing(final)
        row = writer.append({**values, "manifest_sha256": sha256_file(temporary / MANIFEST_NAME)})
        with _interrupts_held_back(f"stopped after {final} was recorded"):
            writer.commit()
            os.rename(temporary, final)
    except BaseException:
        # BaseException on purpose: Ctrl-C must not leave a half-written folder either.
        if not writer.committed:
            shutil.rmtree(temporary, ignore_errors=True)
        raise
    return row


def _write_record_file(folder: Path, values: dict[str, Any], position: ChainPosition) -> None:
    details = values.get("details") or {}
    if isinstance(details, str):
        details = json.loads(details)
    content = {key: values.get(key) for key in ("kind", "record_id", "study_id", "cut",
                                                "created_utc")}
    content.update(details=details, registry_seq=position.seq,
                   registry_follows=position.previous_hash)
    (folder / RECORD_FILE).write_text(json.dumps(content, indent=1, ensure_ascii=False) + "\n",
                                      encoding="utf-8")


def record_run(out_root: Path, registry_path: Path, study_id: str, cut: str, run_id: str,
               write: Write, entry: dict[str, Any], **waiting: Any) -> RecordedFolder:
    """Seal and register a run folder ``<out_root>/<study>/<cut>/<run id>/``.

    ``entry`` gives plan_sha256, lock_status, dummy_arms, data_sha256 and optionally
    created_utc; names it repeats must agree with the arguments.
    """
    filled = {"record_id": run_id, "run_id": run_id, "study_id": study_id, "cut": cut}
    conflicts = [Problem(code="registry.entry_field", field=key,
                         message="record_run fills this field itself",
                         expected=repr(filled[key]), got=repr(entry[key]))
                 for key in ("run_id", "study_id", "cut") if key in entry
                 and entry[key] != filled[key]]
    if "folder" in entry or "manifest_sha256" in entry:
        conflicts.append(Problem(code="registry.entry_field", field="folder",
                                 message="record_run fills the folder and manifest hash itself"))
    if conflicts:
        raise TrialcutError("a registry entry disagrees with the run being recorded", conflicts)
    entry = {key: value for key, value in entry.items() if key not in ("run_id", "study_id")}
    return record_folder(out_root, kind="run", study_id=study_id, group=cut, record_id=run_id,
                         write=write, entry={**entry, "cut": cut}, registry_path=registry_path,
                         **waiting)


def _relative_folder(folder: Path, registry_path: Path) -> str:
    # Relative, so that the output folder can be moved or copied whole and still verify.
    relative = os.path.relpath(folder.resolve(), registry_path.parent.resolve())
    return Path(relative).as_posix()


@contextmanager
def _interrupts_held_back(message: str) -> Iterator[None]:
    """Hold Ctrl-C and SIGTERM back for a few steps, then act on them as an interruption.

    Only the main thread can set signal handlers; elsewhere the steps run unprotected.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []
    held = (signal.SIGINT, signal.SIGTERM)
    previous = {number: signal.signal(number, lambda number, frame: caught.append(number))
                for number in held}
    try:
        yield
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
    if caught:
        raise KeyboardInterrupt(message)


# --------------------------------------------------------------------------- leftovers
@dataclass(frozen=True)
class Leftover:
    """A hidden temporary folder under the output root, and what it is."""

    path: Path
    record_id: str | None
    pid: int | None
    state: str    # "being written", "interrupted", "recorded, not in place"

    def describe(self) -> str:
        if self.state == "being written":
            return (f"{self.path}: being written now by process {self.pid} "
                    f"(record {self.record_id})")
        if self.state == "recorded, not in place":
            return (f"{self.path}: record {self.record_id} was registered but its writer was "
                    "stopped before the folder was moved into place; the next run or "
                    "comparison in this output folder moves it, after checking its manifest")
        return (f"{self.path}: an unfinished record ({self.record_id or 'unknown id'}) whose "
                "writer was killed before it was registered (SIGKILL, a crash or power loss); "
                "it is not a result, and the next run in this output folder removes it")

    def to_dict(self) -> dict[str, Any]:
        return {"path": str(self.path), "record_id": self.record_id, "pid": self.pid,
                "state": self.state}


def find_leftovers(out_root: Path, rows: list[RegistryRow]) -> list[Leftover]:
    registered = {row.record_id for row in rows}
    found = []
    for path in find_temporaries(out_root):
        record_id, pid = parse_temporary_name(path.name)
        if record_id in registered and not (path.parent / record_id).exists():
            state = "recorded, not in place"
        elif process_alive(pid) and pid != os.getpid():
            state = "being written"
        else:
            state = "interrupted"
        found.append(Leftover(path=path, record_id=record_id, pid=pid, state=state))
    return found


def tidy_leftovers(out_root: Path, writer: RegistryWriter) -> list[Leftover]:
    """Under the write lock: finish registered folders left hidden, remove unregistered ones.

    Holding the lock proves no other writer is filling a temporary folder now (writers
    fill them only while they hold it), so an unregistered one is a killed writer's.
    """
    rows = {row.record_id: row for row in writer.rows()}
    handled = []
    for leftover in find_leftovers(out_root, list(rows.values())):
        if leftover.state == "recorded, not in place":
            if _move_into_place(leftover, rows[leftover.record_id]):
                handled.append(leftover)
        elif leftover.record_id not in rows:
            shutil.rmtree(leftover.path, ignore_errors=True)
            handled.append(leftover)
    return handled


def _move_into_place(leftover: Leftover, row: RegistryRow) -> bool:
    path = leftover.path
    try:
        young = time.time() - path.stat().st_mtime < _RENAME_GRACE_SECONDS
    except FileNotFoundError:
        return False
    if (process_alive(leftover.pid) and young) or not (path / MANIFEST_NAME).is_file():
        return False
    if sha256_file(path / MANIFEST_NAME) != row.manifest_sha256:
        return False   # not the registered content: leave it for verify to report
    final = path.parent / leftover.record_id
    if final.exists():
        return False
    os.rename(path, final)
    return True
