"""Verification: does a run folder still match its manifest, and the registry its chain?

``verify_run`` re-hashes one run folder against its MANIFEST.sha256 (naming every changed,
missing and added file), compares the manifest's own hash with the run's registry row,
and walks the registry's whole chain.  ``verify_all`` does the same for every run the
registry knows, and also names run folders on disk that the registry does not know.
Findings raise ``VerificationFailed`` (exit 1) with one Problem each; a path that is not
a run folder, or a missing registry, is an ``InputError`` (exit 2).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from trialcut.errors import InputError, Problem, VerificationFailed
from trialcut.record.manifest import MANIFEST_NAME, list_entries, parse_manifest, sha256_file
from trialcut.record.registry import RegistryRow, list_runs, open_registry, verify_chain
from trialcut.record.runfolder import list_run_folders

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

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        return {"ok": self.ok, "run_folders": list(self.run_folders), "registry": self.registry,
                "files_checked": self.files_checked,
                "registry_rows_checked": self.registry_rows_checked,
                "problems": [problem.to_dict() for problem in self.problems]}

    @property
    def summary(self) -> str:
        checked = f"{len(self.run_folders)} run folder(s), {self.files_checked} file(s), " + (
            f"{self.registry_rows_checked} registry row(s)" if self.registry is not None
            else "no registry (its chain was not checked)")
        if self.ok:
            return f"{checked}; every hash matches"
        return f"{len(self.problems)} problem(s) in {checked}"


def verify_run(run_folder: Path, registry_path: Path | None = None) -> VerificationReport:
    """Check one run folder (and, given a registry, its row and the whole chain)."""
    folder = Path(run_folder)
    # Judge the folder before the registry: a wrong folder argument is the first thing to say.
    readable = registry_path is not None and Path(registry_path).is_file()
    rows = list_runs(registry_path) if readable else []
    row = next((item for item in rows if item.run_id == folder.name), None)
    _require_run_folder(folder, registered=row is not None)
    if registry_path is not None and not readable:
        open_registry(registry_path)  # says the registry is missing and what to pass instead
    files_checked, problems = _folder_problems(folder)
    if registry_path is not None:
        problems += _registration_problems(folder, row, registry_path)
        problems += verify_chain(registry_path)
    report = VerificationReport(
        run_folders=(str(folder),), registry=_text(registry_path), files_checked=files_checked,
        registry_rows_checked=len(rows), problems=tuple(problems))
    return _raise_if_failed(report, f"run folder {folder}")


def verify_all(out_root: Path, registry_path: Path) -> VerificationReport:
    """Check the registry chain, every registered run folder, and unregistered folders."""
    rows = list_runs(registry_path)
    problems = verify_chain(registry_path)
    files_checked, folders = 0, []
    for row in rows:
        folder = row.folder_path(Path(registry_path))
        folders.append(str(folder))
        checked, found = _registered_folder_problems(folder, row, Path(registry_path))
        files_checked += checked
        problems += found
    problems += _unregistered_problems(Path(out_root), rows, Path(registry_path))
    report = VerificationReport(
        run_folders=tuple(folders), registry=str(registry_path), files_checked=files_checked,
        registry_rows_checked=len(rows), problems=tuple(problems))
    return _raise_if_failed(report, f"output folder {out_root}")


def _raise_if_failed(report: VerificationReport, subject: str) -> VerificationReport:
    if report.problems:
        raise VerificationFailed(f"{subject} does not match its records: {report.summary}",
                                 report.problems)
    return report


def _text(path: Path | None) -> str | None:
    return None if path is None else str(path)


def _require_run_folder(folder: Path, registered: bool) -> None:
    """A folder without a manifest is a wrong argument, unless the registry knows it."""
    if folder.is_dir() and ((folder / MANIFEST_NAME).is_file() or registered):
        return
    got = "a folder without MANIFEST.sha256" if folder.is_dir() else (
        "a file" if folder.exists() else "nothing at that path")
    raise InputError(
        f"{folder} is not a run folder",
        [Problem(code="verify.not_a_run_folder", file=str(folder),
                 message="verify needs a run folder",
                 expected="a folder <output>/<study>/<cut>/<run id>/ holding MANIFEST.sha256",
                 got=got,
                 hint="pass one run folder, or leave the run out to verify every registered run")])


def _registered_folder_problems(folder: Path, row: RegistryRow,
                                registry_path: Path) -> tuple[int, list[Problem]]:
    if not folder.is_dir():
        return 0, [Problem(
            code="verify.folder_missing", file=str(registry_path), field=_row_place(row),
            message=f"the registry records this run but its folder {folder} is missing",
            expected="a run folder", got="nothing at that path",
            hint="restore the run folder from a trusted copy; the registry keeps the row")]
    files_checked, problems = _folder_problems(folder)
    return files_checked, problems + _registration_problems(folder, row, registry_path)


def _folder_problems(folder: Path) -> tuple[int, list[Problem]]:
    """Re-hash the folder against its manifest; returns (files hashed, problems)."""
    manifest = folder / MANIFEST_NAME
    if not manifest.is_file():
        return 0, [Problem(code="verify.manifest_missing", file=str(folder),
                           field=MANIFEST_NAME,
                           message="missing: the run folder's manifest was deleted",
                           hint=_RERUN_HINT)]
    text = manifest.read_bytes().decode("utf-8", errors="replace")
    recorded, problems = parse_manifest(text, source=str(manifest))
    on_disk = set(list_entries(folder))
    for path in sorted(recorded):
        problem = _file_problem(folder, path, recorded[path], on_disk)
        if problem is not None:
            problems.append(problem)
    problems += [Problem(code="verify.file_added", file=str(folder), field=path,
                         message="not listed in the run's manifest: added after the run "
                                 "was recorded", hint=_RERUN_HINT)
                 for path in sorted(on_disk - set(recorded))]
    return len(recorded), problems


def _file_problem(folder: Path, path: str, recorded: str, on_disk: set[str]) -> Problem | None:
    target = folder / path
    if path not in on_disk:
        return Problem(code="verify.file_missing", file=str(folder), field=path,
                       message="missing from the run folder",
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
                        message=f"this run ({folder.name}) has no row in the registry "
                                f"{registry_path}",
                        hint="check that this is the registry of the output folder the run "
                             "was written to; if it is, the row was deleted")]
    manifest = folder / MANIFEST_NAME
    if not manifest.is_file():
        return []   # already reported by the folder check
    actual = sha256_file(manifest)
    if actual == row.manifest_sha256:
        return []
    return [Problem(code="verify.manifest_hash_mismatch", file=str(folder), field=MANIFEST_NAME,
                    message=f"does not match the hash recorded in the registry "
                            f"({_row_place(row)}.manifest_sha256)",
                    expected=row.manifest_sha256, got=actual, hint=_RERUN_HINT)]


def _unregistered_problems(out_root: Path, rows: list[RegistryRow],
                           registry_path: Path) -> list[Problem]:
    registered = {row.folder_path(registry_path).resolve() for row in rows}
    return [Problem(code="verify.folder_unregistered", file=str(folder),
                    message=f"this run folder has no row in the registry {registry_path}",
                    hint="its row was deleted, or it was copied here from another output "
                         "folder; do not use it until its origin is known")
            for folder in list_run_folders(out_root) if folder.resolve() not in registered]


def _row_place(row: RegistryRow) -> str:
    return f"runs[seq {row.seq}, run {row.run_id}]"
