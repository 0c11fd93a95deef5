"""Record a run: its folder first, then its registry row, or neither.

The folder is renamed into place before the row is appended, so a registry row always
points at a complete folder.  If the append fails (the registry is locked too long, the
disk is full, Ctrl-C) the new folder is removed again: a run is either fully recorded or
absent, never a folder without its row.
"""
from __future__ import annotations

import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from trialcut.errors import Problem, TrialcutError
from trialcut.record.manifest import MANIFEST_NAME, sha256_file
from trialcut.record.registry import RegistryRow, append_run
from trialcut.record.runfolder import write_run_folder

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
