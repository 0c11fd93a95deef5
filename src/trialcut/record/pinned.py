"""The pinned environment: the project's lock file of exact versions, and how the running
interpreter compares with it.

``requirements/lock.txt`` (written by ``make lock`` with pip-tools) pins every package of
the dependency tree to one version with the SHA-256 of each file that may be installed.
A run records the lock file's own hash and every installed distribution, so a reviewer can
tell whether a run was made in the locked environment and, if not, which package differed.
Reading stays cheap (one small file, no subprocess, no network).
"""
from __future__ import annotations

import hashlib
import re
from importlib import metadata
from pathlib import Path
from typing import Any

PINS_FILE = "requirements/lock.txt"
# Installers and the project itself are not pinned in the lock on purpose.
NOT_PINNED = ("pip", "trialcut")
_PIN = re.compile(r"^([A-Za-z0-9][A-Za-z0-9._-]*)==([^\s;\\]+)")


def normalised_name(name: str) -> str:
    """A distribution name as package indexes compare them (PEP 503)."""
    return re.sub(r"[-_.]+", "-", name).lower()


def installed_distributions() -> dict[str, str]:
    """Every distribution the interpreter can import from, by normalised name, sorted."""
    found: dict[str, str] = {}
    for distribution in metadata.distributions():
        name = distribution.metadata["Name"]
        if name:
            # The first one on sys.path wins, as it does for imports.
            found.setdefault(normalised_name(name), distribution.version)
    return dict(sorted(found.items()))


def find_pins_file(start: Path | None = None) -> Path | None:
    """The lock file of the checkout trialcut runs from; None for an installed copy.

    Walks up from this module to the folder holding pyproject.toml; only an editable
    install (or a run from the source tree) has one.
    """
    here = Path(start or __file__).resolve()
    for folder in here.parents:
        if (folder / "pyproject.toml").is_file():
            candidate = folder / PINS_FILE
            return candidate if candidate.is_file() else None
    return None


def read_pins(path: Path) -> dict[str, str]:
    """{normalised name: version} of every ``name==version`` line of a lock file."""
    pins = {}
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        match = _PIN.match(line)
        if match:
            pins[normalised_name(match.group(1))] = match.group(2)
    return pins


def pins_record(distributions: dict[str, str], path: Path | None = None) -> dict[str, Any]:
    """The lock file's hash and every way the installed packages differ from it."""
    path = path if path is not None else find_pins_file()
    if path is None:
        return {"file": None, "sha256": None, "matches": None,
                "note": "no lock file found (trialcut is not run from a checkout)"}
    pins = read_pins(path)
    return {"file": PINS_FILE, "sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
            **compare_with_pins(pins, distributions)}


def compare_with_pins(pins: dict[str, str], distributions: dict[str, str]) -> dict[str, Any]:
    differ = [{"package": name, "locked": pins[name], "installed": distributions[name]}
              for name in sorted(pins) if name in distributions and distributions[name] != pins[name]]
    missing = sorted(name for name in pins if name not in distributions)
    extra = sorted(name for name in distributions if name not in pins and name not in NOT_PINNED)
    return {"matches": not (differ or missing or extra), "versions_differ": differ,
            "locked_not_installed": missing, "installed_not_locked": extra}
