"""Tamper with a recorded run, as the verification case folders describe.

``apply_tamper(run_folder, registry_path, setup)`` takes the ``setup`` mapping of a
``tests/cases/verify_*/case.yaml`` with exactly one of these keys:

- ``edit_file: <relative path>``      change bytes of an existing file in the run folder
- ``delete_file: <relative path>``    delete a file from the run folder
- ``add_file: <relative path>``       add a file that the manifest does not list
- ``edit_registry_row: <column>``     change one column of the run's registry row
- ``delete_registry_row: true``       delete the run's registry row
- ``edit_registry_row_rehashed: <column>``  change one column and recompute the whole chain
- ``forge_file: <relative path>``     change a file and write a fresh manifest for it
- ``remove_registry: true``           take the registry away (a run folder copied alone)
- ``untouched: true``                 leave the run as it is (cases about commands that take a
                                      good run, e.g. qc with a bad QC file)

The registry is edited with plain ``sqlite3``, the way someone with the file would do it,
not through trialcut.  A setup that cannot be applied raises ValueError, so that a wrong
case file fails loudly instead of testing nothing.
"""
from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
from pathlib import Path, PurePosixPath

TAMPER_ACTIONS = ("edit_file", "delete_file", "add_file", "edit_registry_row",
                  "delete_registry_row", "untouched", "edit_registry_row_rehashed", "forge_file",
                  "remove_registry")


def apply_tamper(run_folder: Path, registry_path: Path, setup: dict) -> None:
    if not isinstance(setup, dict) or len(setup) != 1 or next(iter(setup)) not in TAMPER_ACTIONS:
        raise ValueError(f"setup must have exactly one of {', '.join(TAMPER_ACTIONS)}; "
                         f"got {setup!r}")
    action, argument = next(iter(setup.items()))
    run_folder, registry_path = Path(run_folder), Path(registry_path)
    if action == "edit_file":
        _edit_file(_inside(run_folder, argument))
    elif action == "delete_file":
        _existing(_inside(run_folder, argument)).unlink()
    elif action == "add_file":
        _add_file(_inside(run_folder, argument))
    elif action == "edit_registry_row":
        _edit_row(registry_path, run_folder.name, argument)
    elif action == "edit_registry_row_rehashed":
        _edit_row(registry_path, run_folder.name, argument)
        rehash_chain(registry_path)
    elif action == "forge_file":
        _edit_file(_inside(run_folder, argument))
        regenerate_manifest(run_folder)
    elif argument is not True:
        raise ValueError(f"{action} takes true; got {argument!r}")
    elif action == "delete_registry_row":
        _change_registry(registry_path, "DELETE FROM records WHERE record_id = ?", [run_folder.name])
    elif action == "remove_registry":
        _existing(registry_path).unlink()


def _inside(run_folder: Path, relative: object) -> Path:
    if not isinstance(relative, str) or not relative:
        raise ValueError(f"expected a relative path inside the run folder; got {relative!r}")
    pure = PurePosixPath(relative)
    if pure.is_absolute() or ".." in pure.parts:
        raise ValueError(f"the path must stay inside the run folder; got {relative!r}")
    return run_folder / pure


def _existing(path: Path) -> Path:
    if not path.is_file():
        raise ValueError(f"cannot tamper with {path}: there is no such file in the run")
    return path


def _edit_file(path: Path) -> None:
    # Flip one bit of the last byte (or write one byte into an empty file): the smallest
    # change there is, and the size stays the same, so only the hash can notice it.
    content = bytearray(_existing(path).read_bytes())
    if content:
        content[-1] ^= 0x01
    else:
        content = bytearray(b"x")
    path.write_bytes(bytes(content))


def _add_file(path: Path) -> None:
    if path.exists():
        raise ValueError(f"cannot add {path}: it exists already")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("added after the run was recorded\n", encoding="utf-8")


def _edit_row(registry_path: Path, run_id: str, column: object) -> None:
    with sqlite3.connect(registry_path) as connection:
        columns = [row[1] for row in connection.execute("PRAGMA table_info(records)")]
        found = connection.execute("SELECT * FROM records WHERE record_id = ?", [run_id]).fetchone()
    connection.close()
    if column not in columns:
        raise ValueError(f"the records table has no column {column!r}; it has {columns}")
    if found is None:
        raise ValueError(f"the registry has no row for run {run_id}")
    changed = _changed_value(found[columns.index(column)])
    _change_registry(registry_path, f"UPDATE records SET {column} = ? WHERE record_id = ?",
                     [changed, run_id])


def _changed_value(value: object) -> object:
    if value in ("locked", "unlocked"):   # a rehearsal relabelled as locked, or the reverse
        return {"locked": "unlocked", "unlocked": "locked"}[value]
    if isinstance(value, int):
        return 1 - value if value in (0, 1) else value + 1000
    text = str(value)
    if not text:
        return "x"
    last = text[-1]
    return text[:-1] + ("0" if last != "0" else "1")


def _change_registry(registry_path: Path, statement: str, arguments: list) -> None:
    if not registry_path.is_file():
        raise ValueError(f"no registry at {registry_path}")
    connection = sqlite3.connect(registry_path)
    with connection:
        changed = connection.execute(statement, arguments).rowcount
    connection.close()
    if changed != 1:
        raise ValueError(f"expected to change one registry row; changed {changed}")


# --------------------------------------------------------------------------- a forger's tools
# What someone with write access to the output folder can do without any secret: rewrite
# files, write a fresh manifest, edit rows and recompute the whole chain.  Written with the
# standard library only (hashlib, json, sqlite3), from the rule the registry documents.
def regenerate_manifest(folder: Path) -> str:
    """Write MANIFEST.sha256 afresh for the folder's files; return the new manifest's SHA-256."""
    lines = []
    for path in sorted(p for p in folder.rglob("*") if p.is_file() and p.name != "MANIFEST.sha256"):
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        lines.append(f"{digest}  {path.relative_to(folder).as_posix()}\n")
    text = "".join(sorted(lines, key=lambda line: line[66:]))
    (folder / "MANIFEST.sha256").write_text(text, encoding="utf-8", newline="\n")
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def rehash_chain(registry_path: Path) -> None:
    """Recompute every row's previous_hash and row_hash, as a forger would after an edit."""
    connection = sqlite3.connect(registry_path)
    connection.row_factory = sqlite3.Row
    with connection:
        rows = [dict(row) for row in connection.execute("SELECT * FROM records ORDER BY seq")]
        previous = "0" * 64
        for row in rows:
            row["previous_hash"] = previous
            hashed = {key: value for key, value in row.items() if key != "row_hash"}
            text = json.dumps(hashed, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
            previous = hashlib.sha256(text.encode("utf-8")).hexdigest()
            connection.execute("UPDATE records SET previous_hash = ?, row_hash = ? WHERE seq = ?",
                               [row["previous_hash"], previous, row["seq"]])
    connection.close()


def set_row_field(registry_path: Path, record_id: str, column: str, value: object) -> None:
    _change_registry(registry_path, f"UPDATE records SET {column} = ? WHERE record_id = ?",
                     [value, record_id])


def erase_newest(registry_path: Path) -> str:
    """Remove the newest row, its folder and SQLite's memory of its number; return its id."""
    connection = sqlite3.connect(registry_path)
    with connection:
        seq, record_id, folder = connection.execute(
            "SELECT seq, record_id, folder FROM records ORDER BY seq DESC LIMIT 1").fetchone()
        connection.execute("DELETE FROM records WHERE seq = ?", [seq])
        connection.execute("UPDATE sqlite_sequence SET seq = ? WHERE name = 'records'", [seq - 1])
    connection.close()
    shutil.rmtree(Path(registry_path).parent / folder)
    return record_id
