"""Run folders: ``<out root>/<study>/<cut>/<run id>/``, written whole or not at all.

A run folder is filled inside a temporary sibling (same parent, so the same file system)
whose name is ``.tmp-<id>-<process id>-<random>``; its files are hashed into
MANIFEST.sha256, flushed to disk, and the folder is renamed into place in one step.  A
reader therefore sees either no run folder or a complete one.  Anything that goes wrong on
the way (an exception, Ctrl-C) removes the temporary folder.  A process killed outright
leaves a ``.tmp-`` folder behind: listings skip it, ``verify`` and ``history`` name it
(the process id in its name tells a run still being written from a killed one), and
the next write removes it (see :mod:`trialcut.record.seal`).

The same folders hold every sealed record, not only runs: each lives three levels below
the output root, ``<out root>/<study>/<group>/<id>/``, where the group is the data cut of a
run, or ``comparisons``, ``renderings``, ``approvals``… for the other kinds.
"""
from __future__ import annotations

import os
import re
import secrets
import shutil
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

from trialcut.errors import Problem, RunFolderError
from trialcut.record.manifest import write_manifest

TEMP_PREFIX = ".tmp-"
STALE_AFTER_SECONDS = 3600
MAX_NAME_LENGTH = 100
_SAFE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
_SAFE_NAME_RULE = (f"letters, digits, '.', '_' or '-', starting with a letter or digit, "
                   f"no '..', at most {MAX_NAME_LENGTH} characters")


def new_run_id(now: datetime | None = None) -> str:
    """``20261202T103015Z-7f3a``: UTC second, then 4 random hex digits.

    Sorting run ids as text sorts them by time (to the second); the suffix keeps two runs
    started in the same second apart.  A naive ``now`` is taken to be UTC already.
    """
    moment = now or datetime.now(timezone.utc)
    if moment.tzinfo is not None:
        moment = moment.astimezone(timezone.utc)
    return f"{moment:%Y%m%dT%H%M%SZ}-{secrets.token_hex(2)}"


def safe_folder_name(value: object, what: str) -> str:
    """Return ``value`` if it can be one folder name as it is; raise RunFolderError if not.

    Names are refused rather than rewritten: a silent rewrite could send two studies to
    the same folder.  The error suggests a name that would pass.
    """
    text = value if isinstance(value, str) else ""
    if (_SAFE_NAME.fullmatch(text) and ".." not in text
            and len(text) <= MAX_NAME_LENGTH):
        return text
    raise RunFolderError(
        f"the {what} {value!r} cannot be used as a folder name",
        [Problem(code="record.unsafe_name", field=what,
                 message=f"the {what} becomes a folder name under the output folder",
                 expected=_SAFE_NAME_RULE, got=_why_unsafe(value),
                 hint=f"use a name such as {_suggest_name(value)!r}")])


def _why_unsafe(value: object) -> str:
    if not isinstance(value, str):
        return f"a {type(value).__name__}, not text"
    if not value:
        return "an empty name"
    if "/" in value or "\\" in value:
        return f"{value!r}, which contains a path separator"
    if ".." in value:
        return f"{value!r}, which contains '..'"
    if len(value) > MAX_NAME_LENGTH:
        return f"a name of {len(value)} characters"
    return repr(value)


def _suggest_name(value: object) -> str:
    text = re.sub(r"[^A-Za-z0-9._-]+", "-", str(value) if value is not None else "")
    text = re.sub(r"\.{2,}", ".", text).strip("-._")[:MAX_NAME_LENGTH]
    return text or "cut-1"


def write_run_folder(out_root: Path, study_id: str, cut: str, run_id: str,
                     write: Callable[[Path], None]) -> Path:
    """Create ``out_root/study_id/cut/run_id/`` filled by ``write(folder)``; return its path.

    ``write`` receives the temporary folder and puts every file in it; MANIFEST.sha256 is
    added afterwards.  Never replaces an existing run folder (RunFolderError).
    """
    parent = Path(out_root) / safe_folder_name(study_id, "study id") / safe_folder_name(cut, "cut")
    final = parent / safe_folder_name(run_id, "run id")
    make_parent(parent)
    remove_stale_temporaries(parent)
    refuse_existing(final)
    temporary = make_temporary(parent, run_id)
    try:
        write(temporary)
        seal_temporary(temporary)
        refuse_existing(final)
        os.rename(temporary, final)
    except BaseException:
        # BaseException on purpose: Ctrl-C must not leave a half-written folder either.
        shutil.rmtree(temporary, ignore_errors=True)
        raise
    try:
        _sync_directory(parent)   # makes the new name itself durable
    except BaseException:
        shutil.rmtree(final, ignore_errors=True)
        raise
    return final


_TEMPORARY_NAME = re.compile(r"\.tmp-(?P<record>.+)-(?P<pid>\d+)-(?P<token>[0-9a-f]{8})")


def make_temporary(parent: Path, record_id: str) -> Path:
    """A new empty hidden folder in ``parent`` whose name tells the record and the process."""
    temporary = parent / f"{TEMP_PREFIX}{record_id}-{os.getpid()}-{secrets.token_hex(4)}"
    temporary.mkdir()
    return temporary


def parse_temporary_name(name: str) -> tuple[str | None, int | None]:
    """(record id, process id) from a temporary folder's name; (None, None) if not ours."""
    match = _TEMPORARY_NAME.fullmatch(name)
    return (match["record"], int(match["pid"])) if match else (None, None)


def seal_temporary(temporary: Path) -> None:
    """Write the manifest of a filled temporary folder and flush everything to disk."""
    write_manifest(temporary)
    _sync_directories(temporary)


def process_alive(pid: int | None) -> bool:
    if pid is None or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:   # alive, but another user's
        return True
    return True


def find_temporaries(out_root: Path) -> list[Path]:
    """Every hidden temporary folder where sealed folders go (``<root>/<study>/<group>/``)."""
    found = []
    for study_folder in _visible_folders(Path(out_root)):
        for group_folder in _visible_folders(study_folder):
            found += _temporary_folders(group_folder)
    return found


def make_parent(parent: Path) -> None:
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise RunFolderError(
            f"cannot create the output folder {parent}",
            [Problem(code="record.output_unwritable", file=str(parent),
                     message="the output folder could not be created",
                     got=f"{type(error).__name__}: {error}",
                     hint="choose another output folder with --out, or fix its permissions")]
        ) from error


def refuse_existing(final: Path) -> None:
    # A rename onto an existing non-empty folder fails on POSIX anyway; checking first
    # gives a readable error and also protects an existing *empty* folder.
    if os.path.lexists(final):
        raise RunFolderError(
            f"the run folder {final} already exists",
            [Problem(code="record.run_exists", file=str(final),
                     message="a run folder is never overwritten",
                     expected="a new run id", got="an existing folder",
                     hint="start a new run (each run gets a fresh id); "
                          "remove the old folder only if it is not a recorded run")])


def remove_stale_temporaries(parent: Path, now: float | None = None) -> list[Path]:
    """Remove ``.tmp-*`` folders in ``parent`` older than an hour; return what was removed."""
    now = time.time() if now is None else now
    removed = []
    for entry in _temporary_folders(parent):
        try:
            age = now - entry.stat().st_mtime
        except FileNotFoundError:
            continue   # another writer finished or cleaned it meanwhile
        if age > STALE_AFTER_SECONDS:
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    return removed


def _temporary_folders(parent: Path) -> list[Path]:
    if not parent.is_dir():
        return []
    return sorted(entry for entry in parent.iterdir()
                  if entry.name.startswith(TEMP_PREFIX) and entry.is_dir()
                  and not entry.is_symlink())


def list_run_folders(out_root: Path, study: str | None = None,
                     cut: str | None = None) -> list[Path]:
    """Every run folder under ``out_root`` (optionally one study / cut), sorted.

    Hidden entries, including unfinished ``.tmp-`` folders, are not run folders.
    """
    root = Path(out_root)
    studies = [root / study] if study is not None else _visible_folders(root)
    found = []
    for study_folder in studies:
        cuts = [study_folder / cut] if cut is not None else _visible_folders(study_folder)
        for cut_folder in cuts:
            found += _visible_folders(cut_folder)
    return found


def _visible_folders(folder: Path) -> list[Path]:
    if not folder.is_dir():
        return []
    return sorted(entry for entry in folder.iterdir()
                  if entry.is_dir() and not entry.name.startswith("."))


def _sync_directories(folder: Path) -> None:
    """fsync every folder below and including ``folder`` (the files were synced when hashed)."""
    for directory, _, _ in os.walk(folder, topdown=False):
        _sync_directory(Path(directory))


def _sync_directory(folder: Path) -> None:
    # Directory fsync makes the new names durable; Windows cannot open a directory for it.
    if os.name != "posix":
        return
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)
