"""Verification: do the sealed folders still match their manifests and rows, the registry its chain?

``verify_folder`` re-hashes one sealed folder (a run, comparison, rendering…) against its
MANIFEST.sha256 (naming every changed, missing and added file and folder), compares the
manifest's own hash and every field of the folder's registry row with the sealed content
(a run's results.json; ``record.json`` for the other kinds), and walks the registry's
whole chain.  ``verify_all`` does the same for every row, names visible folders the
registry does not know, and reports hidden leftovers of interrupted writers.  Given a
chain head kept elsewhere (``head``), both also check that it is still in the chain.

Findings raise ``VerificationFailed`` (exit 1) with one Problem each; a path that is not a
sealed folder, or a missing registry, is an ``InputError`` (exit 2).
"""
from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from trialcut.errors import InputError, Problem, VerificationFailed
from trialcut.record.manifest import MANIFEST_NAME, list_entries, parse_manifest, sha256_file
from trialcut.record.registry import (GENESIS_HASH, REGISTRY_NAME, RegistryRow, canonical_json,
                                      known_head_problems, list_records, verify_chain)
from trialcut.record.runfolder import list_run_folders
from trialcut.record.seal import RECORD_FILE, Leftover, find_leftovers

_RERUN_HINT = ("do not use this folder's results; restore it from a trusted copy or run the "
               "locked plan on the data cut again")


@dataclass(frozen=True)
class VerificationReport:
    """What was checked and what was found; ``problems`` is empty when all is well."""

    run_folders: tuple[str, ...]
    registry: str | None
    files_checked: int
    registry_rows_checked: int
    problems: tuple[Problem, ...] = ()
    head: str | None = None                 # the chain head now (row hash of the newest row)
    rows_after_known_head: tuple[str, ...] = ()
    leftovers: tuple[Leftover, ...] = ()

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        return {"ok": self.ok, "run_folders": list(self.run_folders), "registry": self.registry,
                "files_checked": self.files_checked,
                "registry_rows_checked": self.registry_rows_checked, "head": self.head,
                "rows_after_known_head": list(self.rows_after_known_head),
                "leftovers": [leftover.to_dict() for leftover in self.leftovers],
                "problems": [problem.to_dict() for problem in self.problems]}

    @property
    def summary(self) -> str:
        checked = f"{len(self.run_folders)} sealed folder(s), {self.files_checked} file(s), " + (
            f"{self.registry_rows_checked} registry row(s)" if self.registry is not None
            else "NO REGISTRY (rows and chain not checked)")
        if self.ok and self.registry is None:
            return f"{checked}; every file matches the folder's own manifest"
        if self.ok:
            return f"{checked}; every hash and every row matches"
        return f"{len(self.problems)} problem(s) in {checked}"


def registry_beside(folder: Path) -> Path:
    """The registry of a sealed folder ``<root>/<study>/<group>/<id>``: ``<root>/registry.sqlite``."""
    return Path(folder).resolve().parent.parent.parent / REGISTRY_NAME


def verify_folder(folder: Path, registry_path: Path | None = None,
                  head: str | None = None) -> VerificationReport:
    """Check one sealed folder; with a registry also its row, the whole chain and ``head``."""
    folder = Path(folder)
    # Judge the folder before the registry: a wrong folder argument is the first thing to say.
    readable = registry_path is not None and Path(registry_path).is_file()
    rows = list_records(registry_path) if readable else []
    row = _row_of(folder, rows, registry_path)
    _require_sealed_folder(folder, registered=row is not None)
    if registry_path is not None and not readable:
        list_records(registry_path)   # says the registry is missing and what to pass instead
    files_checked, problems = folder_problems(folder)
    after: tuple[str, ...] = ()
    if registry_path is not None:
        problems += _registration_problems(folder, row, Path(registry_path))
        if row is not None:
            problems += row_fact_problems(folder, row, Path(registry_path), rows)
        problems += verify_chain(registry_path)
        head_problems, after = _head_problems(registry_path, head)
        problems += head_problems
    report = VerificationReport(
        run_folders=(str(folder),), registry=_text(registry_path), files_checked=files_checked,
        registry_rows_checked=len(rows), problems=tuple(problems),
        head=rows[-1].row_hash if rows else (GENESIS_HASH if readable else None),
        rows_after_known_head=after)
    return _raise_if_failed(report, f"{folder}")


verify_run = verify_folder


def verify_all(out_root: Path, registry_path: Path, head: str | None = None) -> VerificationReport:
    """Check the chain, every row's folder and fields, unregistered folders and leftovers."""
    registry_path = Path(registry_path)
    rows = list_records(registry_path)
    problems = verify_chain(registry_path)
    leftovers = find_leftovers(Path(out_root), rows)
    hidden = {leftover.record_id: leftover for leftover in leftovers
              if leftover.state == "recorded, not in place"}
    files_checked, folders = 0, []
    for row in rows:
        folder = row.folder_path(registry_path)
        folders.append(str(folder))
        checked, found = _registered_folder_problems(folder, row, registry_path, rows,
                                                     hidden.get(row.record_id))
        files_checked += checked
        problems += found
    problems += _unregistered_problems(Path(out_root), rows, registry_path)
    head_problems, after = _head_problems(registry_path, head)
    report = VerificationReport(
        run_folders=tuple(folders), registry=str(registry_path), files_checked=files_checked,
        registry_rows_checked=len(rows), problems=tuple(problems + head_problems),
        head=rows[-1].row_hash if rows else GENESIS_HASH, rows_after_known_head=after,
        leftovers=tuple(leftover for leftover in leftovers
                        if leftover.state != "recorded, not in place"))
    return _raise_if_failed(report, f"output folder {out_root}")


def _head_problems(registry_path: Path, head: str | None) -> tuple[list[Problem], tuple[str, ...]]:
    if head is None:
        return [], ()
    problems, after = known_head_problems(registry_path, head)
    return problems, tuple(f"seq {row.seq}: {row.kind} {row.record_id}" for row in after)


def _raise_if_failed(report: VerificationReport, subject: str) -> VerificationReport:
    if report.problems:
        raise VerificationFailed(f"{subject} does not match its records: {report.summary}",
                                 report.problems)
    return report


def _text(path: Path | None) -> str | None:
    return None if path is None else str(path)


def _row_of(folder: Path, rows: list[RegistryRow], registry_path: Path | None) -> RegistryRow | None:
    named = [row for row in rows if row.record_id == folder.name]
    if registry_path is None or not named:
        return None
    return named[0]


def _require_sealed_folder(folder: Path, registered: bool) -> None:
    """A folder without a manifest is a wrong argument, unless the registry knows it."""
    if folder.is_dir() and ((folder / MANIFEST_NAME).is_file() or registered):
        return
    got = "a folder without MANIFEST.sha256" if folder.is_dir() else (
        "a file" if folder.exists() else "nothing at that path")
    raise InputError(
        f"{folder} is not a run folder",
        [Problem(code="verify.not_a_run_folder", file=str(folder),
                 message="verify needs a sealed folder (a run, comparison or rendering)",
                 expected="a folder <output>/<study>/<cut or group>/<id>/ holding MANIFEST.sha256",
                 got=got,
                 hint="pass one run folder, or leave the run out to verify every registered run")])


def _registered_folder_problems(folder: Path, row: RegistryRow, registry_path: Path,
                                rows: list[RegistryRow],
                                hidden: Leftover | None) -> tuple[int, list[Problem]]:
    if not folder.is_dir():
        if hidden is not None:
            return 0, [Problem(
                code="verify.folder_not_in_place", file=str(registry_path), field=row.place,
                message=f"this record was registered, but its writer was stopped before the "
                        f"folder was moved into place; it is still at {hidden.path}",
                expected=f"a folder {folder}", got="the hidden temporary folder only",
                hint="the next 'trialcut run' or 'compare' into this output folder moves it "
                     "into place after checking its manifest; then verify again")]
        return 0, [Problem(
            code="verify.folder_missing", file=str(registry_path), field=row.place,
            message=f"the registry records this {row.kind} but its folder {folder} is missing",
            expected="a sealed folder", got="nothing at that path",
            hint="restore the folder from a trusted copy; the registry keeps the row")]
    files_checked, problems = folder_problems(folder)
    problems += _registration_problems(folder, row, registry_path)
    return files_checked, problems + row_fact_problems(folder, row, registry_path, rows)


def folder_problems(folder: Path) -> tuple[int, list[Problem]]:
    """Re-hash the folder against its manifest; returns (files hashed, problems)."""
    manifest = folder / MANIFEST_NAME
    if not manifest.is_file():
        return 0, [Problem(code="verify.manifest_missing", file=str(folder),
                           field=MANIFEST_NAME,
                           message="missing: the folder's manifest was deleted",
                           hint=_RERUN_HINT)]
    text = manifest.read_bytes().decode("utf-8", errors="replace")
    recorded, problems = parse_manifest(text, source=str(manifest))
    on_disk = set(list_entries(folder))
    for path in sorted(recorded):
        problem = _file_problem(folder, path, recorded[path], on_disk)
        if problem is not None:
            problems.append(problem)
    problems += [Problem(code="verify.file_added", file=str(folder), field=path,
                         message="not listed in the folder's manifest: added after it "
                                 "was recorded", hint=_RERUN_HINT)
                 for path in sorted(on_disk - set(recorded))]
    problems += [Problem(code="verify.folder_added", file=str(folder), field=f"{path}/",
                         message="an empty folder not listed in the manifest: added after it "
                                 "was recorded", hint=_RERUN_HINT)
                 for path in _empty_folders(folder)]
    return len(recorded), problems


def _empty_folders(folder: Path) -> list[str]:
    """Sub-folders holding no file at any depth (a manifest lists files only)."""
    found = []
    for directory, subdirectories, files in os.walk(folder):
        for name in subdirectories:
            path = Path(directory) / name
            if not path.is_symlink() and not any(item.is_file() or item.is_symlink()
                                                 for item in path.rglob("*")):
                found.append(path.relative_to(folder).as_posix())
    return sorted(entry for entry in found
                  if not any(entry.startswith(other + "/") for other in found))


def _file_problem(folder: Path, path: str, recorded: str, on_disk: set[str]) -> Problem | None:
    target = folder / path
    if path not in on_disk:
        return Problem(code="verify.file_missing", file=str(folder), field=path,
                       message="missing from the folder",
                       expected=f"a file with SHA-256 {recorded}", got="no file",
                       hint=_RERUN_HINT)
    if target.is_symlink():
        return Problem(code="verify.symbolic_link", file=str(folder), field=path,
                       message="replaced by a symbolic link",
                       expected="a regular file", got="a symbolic link", hint=_RERUN_HINT)
    actual = sha256_file(target)
    if actual != recorded:
        return Problem(code="verify.file_changed", file=str(folder), field=path,
                       message="changed since the run was recorded",
                       expected=f"SHA-256 {recorded}", got=f"SHA-256 {actual}",
                       hint=_RERUN_HINT)
    return None


def _registration_problems(folder: Path, row: RegistryRow | None,
                           registry_path: Path) -> list[Problem]:
    if row is None:
        return [Problem(code="verify.not_registered", file=str(folder),
                        message=f"this folder ({folder.name}) has no row in the registry "
                                f"{registry_path}",
                        hint="check that this is the registry of the output folder it was "
                             "written to; if it is, the row was deleted")]
    manifest = folder / MANIFEST_NAME
    if not manifest.is_file():
        return []   # already reported by the folder check
    actual = sha256_file(manifest)
    if actual == row.manifest_sha256:
        return []
    return [Problem(code="verify.manifest_hash_mismatch", file=str(folder), field=MANIFEST_NAME,
                    message=f"does not match the hash recorded in the registry "
                            f"({row.place}.manifest_sha256)",
                    expected=row.manifest_sha256, got=actual, hint=_RERUN_HINT)]


# --------------------------------------------------------------------------- row vs folder
def row_fact_problems(folder: Path, row: RegistryRow, registry_path: Path,
                      rows: list[RegistryRow]) -> list[Problem]:
    """Every row field that disagrees with what the sealed folder itself says."""
    sealed, unreadable = _sealed_facts(folder, row.kind)
    if unreadable is not None:
        return [unreadable]
    if not sealed:
        return []
    problems = [_fact_problem(folder, row, field, value, sealed_value)
                for field, sealed_value in sealed.items()
                if (value := getattr(row, field)) != sealed_value]
    problems += _location_problems(folder, row, registry_path)
    problems += _source_problems(folder, row, rows)
    return problems


def _fact_problem(folder: Path, row: RegistryRow, field: str, value: Any, sealed: Any) -> Problem:
    source = "results.json" if row.kind == "run" else RECORD_FILE
    return Problem(
        code="verify.row_disagrees", file=str(folder), field=f"{row.place}.{field}",
        message=f"the registry row says {value!r} but the sealed {source} says {sealed!r}: "
                "the row was edited (and its chain rebuilt) or the folder belongs elsewhere",
        expected=repr(sealed), got=repr(value), hint=_RERUN_HINT)


def _sealed_facts(folder: Path, kind: str) -> tuple[dict[str, Any], Problem | None]:
    name = "results.json" if kind == "run" else RECORD_FILE
    if not (folder / name).is_file():
        return {}, None   # reported as a missing file by the manifest check
    try:
        content = json.loads((folder / name).read_text(encoding="utf-8"))
        return (_run_facts(content) if kind == "run" else _record_facts(content)), None
    except (OSError, ValueError, TypeError, AttributeError, KeyError) as error:
        return {}, Problem(
            code="verify.sealed_facts_unreadable", file=str(folder / name),
            message=f"the row cannot be compared with the folder: {name} cannot be read",
            got=f"{type(error).__name__}: {error}", hint=_RERUN_HINT)


def _run_facts(results: dict[str, Any]) -> dict[str, Any]:
    run, plan, data = results["run"], results["plan"], results["data"]
    lock_status = plan.get("lock_status") or ("unlocked" if run.get("unlocked") else "locked")
    return {"kind": "run", "record_id": run["id"], "study_id": run["study_id"],
            "cut": run["cut"], "created_utc": run["started_utc"],
            "plan_sha256": plan["sha256"], "lock_status": lock_status,
            "dummy_arms": int(run.get("dummy_arms_seed") is not None),
            "data_sha256": data["sha256"]}


def _record_facts(record: dict[str, Any]) -> dict[str, Any]:
    facts = {key: record[key] for key in ("kind", "record_id", "study_id", "cut", "created_utc")}
    facts["details"] = canonical_json(record.get("details") or {})
    return facts


def _location_problems(folder: Path, row: RegistryRow, registry_path: Path) -> list[Problem]:
    parts = PurePosixPath(row.folder).parts
    expected_study = parts[-3] if len(parts) >= 3 else None
    wrong = (parts[-1:] != (row.record_id,) or expected_study != row.study_id
             or (row.kind == "run" and parts[-2] != row.cut))
    if not wrong:
        return []
    return [Problem(code="verify.row_disagrees", file=str(registry_path), field=f"{row.place}.folder",
                    message="the row's folder is not where its study, cut and id put it",
                    expected=f"<root>/{row.study_id}/<group>/{row.record_id}", got=row.folder,
                    hint=_RERUN_HINT)]


def _source_problems(folder: Path, row: RegistryRow, rows: list[RegistryRow]) -> list[Problem]:
    """A record built on others (a comparison of two runs) names them by id and manifest hash."""
    by_id = {other.record_id: other for other in rows}
    problems = []
    for source in row.details_dict().get("sources") or []:
        found = by_id.get(source.get("record_id"))
        if found is None or found.manifest_sha256 != source.get("manifest_sha256"):
            problems.append(Problem(
                code="verify.source_changed", file=str(folder), field=f"{row.place}.details",
                message=f"this {row.kind} was made from {source.get('record_id')}, which is "
                        "no longer registered with the manifest it had then",
                expected=str(source.get("manifest_sha256")),
                got=found.manifest_sha256 if found else "no such row", hint=_RERUN_HINT))
    return problems


def _unregistered_problems(out_root: Path, rows: list[RegistryRow],
                           registry_path: Path) -> list[Problem]:
    registered = {row.folder_path(registry_path).resolve() for row in rows}
    return [Problem(code="verify.folder_unregistered", file=str(folder),
                    message=f"this folder has no row in the registry {registry_path}",
                    hint=_unregistered_hint(folder))
            for folder in list_run_folders(out_root) if folder.resolve() not in registered]


def _unregistered_hint(folder: Path) -> str:
    if folder.parent.name == "comparisons" and not (folder / MANIFEST_NAME).exists():
        # trialcut before registry format 2 wrote comparisons without sealing them.
        return ("an unsealed comparison (no manifest), as trialcut wrote them before comparisons "
                "were recorded: it was never part of the record; move it out of the output "
                "folder, and run 'trialcut compare' again for a recorded one")
    return ("its row was deleted, it was added by hand, or it was copied here from another "
            "output folder; do not use it until its origin is known")
