"""MANIFEST.sha256: every file of a run folder with its SHA-256.

The format is the one the coreutils ``sha256sum`` command writes and checks: one line
per file, ``<64 lower-case hex digits><two spaces><relative path>``, LF line ends, paths
with ``/`` and sorted by code point.  A reviewer without trialcut can therefore check a
run folder with ``cd <run folder> && sha256sum -c MANIFEST.sha256``.  File names that
``sha256sum`` would have to escape (a backslash or a line break) are refused when a
manifest is written, so the plain format always suffices.  A file named ``-`` is written
``./-``: ``sha256sum -c`` reads a bare ``-`` as standard input, not as the file.
"""
from __future__ import annotations

import hashlib
import os
import re
from pathlib import Path, PurePosixPath

from trialcut.errors import Problem, RunFolderError

MANIFEST_NAME = "MANIFEST.sha256"
_CHUNK_BYTES = 1 << 20
_LINE = re.compile(r"([0-9a-f]{64})  (.+)")
_NAME_NEEDS_ESCAPE = re.compile(r"[\\\n\r]")
_STANDARD_INPUT = "-"            # what sha256sum reads a bare '-' as
_STANDARD_INPUT_FILE = "./-"     # how a file of that name is written so sha256sum reads the file


def sha256_file(path: Path, sync: bool = False) -> str:
    """Hex SHA-256 of a file, read in chunks; ``sync`` also flushes it to disk."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(_CHUNK_BYTES), b""):
            digest.update(chunk)
        if sync:
            os.fsync(handle.fileno())
    return digest.hexdigest()


def list_entries(folder: Path) -> list[str]:
    """Relative paths (with ``/``) of every file and symbolic link under ``folder``.

    Symbolic links are listed, not followed, so that a caller can refuse them: a link
    could point outside the run folder and change without the folder changing.  The
    manifest itself is left out.  Sorted by code point, as the manifest is.
    """
    found = []
    for directory, subdirectories, files in os.walk(folder):
        relative_directory = Path(directory).relative_to(folder)
        linked = [name for name in subdirectories if (Path(directory) / name).is_symlink()]
        found += [(relative_directory / name).as_posix() for name in files + linked]
    return sorted(entry for entry in found if entry != MANIFEST_NAME)


def manifest_text(hashes: dict[str, str]) -> str:
    written = {_written_name(path): digest for path, digest in hashes.items()}
    return "".join(f"{written[name]}  {name}\n" for name in sorted(written))


def _written_name(path: str) -> str:
    return _STANDARD_INPUT_FILE if path == _STANDARD_INPUT else path


def write_manifest(folder: Path) -> Path:
    """Hash (and fsync) every file in ``folder`` and write MANIFEST.sha256 beside them."""
    entries = list_entries(folder)
    _refuse_unlistable(folder, entries)
    hashes = {entry: sha256_file(folder / entry, sync=True) for entry in entries}
    manifest = folder / MANIFEST_NAME
    with open(manifest, "w", encoding="utf-8", newline="\n") as handle:
        handle.write(manifest_text(hashes))
        handle.flush()
        os.fsync(handle.fileno())
    return manifest


def _refuse_unlistable(folder: Path, entries: list[str]) -> None:
    problems = []
    for entry in entries:
        if (folder / entry).is_symlink():
            problems.append(Problem(
                code="record.symbolic_link", file=str(folder), field=entry,
                message="a run folder may hold only regular files",
                got="a symbolic link",
                hint="write a copy of the file into the run folder instead of a link"))
        elif _NAME_NEEDS_ESCAPE.search(entry):
            problems.append(Problem(
                code="record.unlistable_name", file=str(folder), field=repr(entry),
                message="this file name cannot be written to MANIFEST.sha256 as plain text",
                expected="a name without backslashes or line breaks", got=repr(entry),
                hint="rename the file"))
    if problems:
        raise RunFolderError(f"{folder}: the run folder cannot be listed in its manifest",
                             problems)


def parse_manifest(text: str, source: str) -> tuple[dict[str, str], list[Problem]]:
    """Read MANIFEST.sha256 text into {relative path: hex}; bad lines become problems.

    A malformed manifest is a finding (someone edited it), not a crash, so the lines that
    do parse are still returned and checked.
    """
    hashes: dict[str, str] = {}
    problems: list[Problem] = []
    if text and not text.endswith("\n"):
        text += "\n"
    for number, line in enumerate(text.split("\n")[:-1], start=1):
        problem = _line_problem(line, hashes, source, number)
        if problem is not None:
            problems.append(problem)
            continue
        digest, path = _LINE.fullmatch(line).groups()
        hashes[_read_name(path)] = digest
    return hashes, problems


def _read_name(written: str) -> str:
    return _STANDARD_INPUT if written == _STANDARD_INPUT_FILE else written


def _line_problem(line: str, seen: dict[str, str], source: str, number: int) -> Problem | None:
    match = _LINE.fullmatch(line)
    if match is None:
        return Problem(code="verify.manifest_malformed", file=source, line=number,
                       message="this manifest line is not '<sha256 hex>  <path>'",
                       expected="64 lower-case hex digits, two spaces, a relative path",
                       got=repr(line), hint="restore MANIFEST.sha256 from a trusted copy")
    path = match.group(2)
    if path == _STANDARD_INPUT:
        return Problem(code="verify.manifest_malformed", file=source, line=number,
                       message="this manifest line names '-', which sha256sum -c reads as "
                               "standard input rather than a file",
                       expected=f"'{_STANDARD_INPUT_FILE}' for a file named '-'", got=repr(path),
                       hint="restore MANIFEST.sha256 from a trusted copy")
    path = _read_name(path)
    pure = PurePosixPath(path)
    if pure.is_absolute() or ".." in pure.parts or path == MANIFEST_NAME or "\\" in path:
        return Problem(code="verify.manifest_malformed", file=source, line=number,
                       message="this manifest line names a path outside the run folder",
                       expected="a relative path inside the run folder", got=repr(path),
                       hint="restore MANIFEST.sha256 from a trusted copy")
    if path in seen:
        return Problem(code="verify.manifest_malformed", file=source, line=number,
                       message="this manifest lists the same file twice", got=repr(path),
                       hint="restore MANIFEST.sha256 from a trusted copy")
    return None
