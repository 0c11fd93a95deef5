"""The pinned environment: the lock file is read as pip reads it and compared honestly."""
from __future__ import annotations

import hashlib
from importlib import metadata
from pathlib import Path

from trialcut.record.pinned import (compare_with_pins, find_pins_file, installed_distributions,
                                    normalised_name, pins_record, read_pins)

REPO = Path(__file__).resolve().parents[2]
LOCK = REPO / "requirements" / "lock.txt"


def test_names_are_compared_as_package_indexes_compare_them():
    # Reference: PEP 503, "Normalized Names" (runs of -, _ and . become one -, lower case).
    assert normalised_name("Python_Docx") == "python-docx"
    assert normalised_name("zope.interface") == "zope-interface"
    assert normalised_name("a-_.b") == "a-b"


def test_installed_distributions_agree_with_importlib_metadata():
    found = installed_distributions()
    # Reference: importlib.metadata.version (standard library), asked one package at a time.
    for name in ("numpy", "scipy", "pyyaml", "cryptography"):
        assert found[name] == metadata.version(name)
    assert list(found) == sorted(found)


def test_the_repository_lock_pins_every_installed_dependency_with_hashes():
    text = LOCK.read_text(encoding="utf-8")
    pins = read_pins(LOCK)
    assert {"numpy", "scipy", "statsmodels", "cryptography", "python-docx", "pytest",
            "dask", "distributed", "setuptools"} <= set(pins)
    # pip's --require-hashes needs a hash under every pin: count pins and hashed pins.
    blocks = [block for block in text.split("\n") if block and not block.startswith((" ", "#"))]
    assert len(blocks) == len(pins)
    assert all(line.endswith("\\") for line in blocks), "every pin is followed by its hashes"


def test_comparison_names_each_kind_of_difference():
    pins = {"numpy": "2.0.0", "scipy": "1.14.0", "wheel": "0.45.0"}
    installed = {"numpy": "2.0.0", "scipy": "1.13.1", "pip": "24.0", "six": "1.16.0"}
    compared = compare_with_pins(pins, installed)
    assert compared["matches"] is False
    assert compared["versions_differ"] == [{"package": "scipy", "locked": "1.14.0",
                                            "installed": "1.13.1"}]
    assert compared["locked_not_installed"] == ["wheel"]
    assert compared["installed_not_locked"] == ["six"]    # pip is an installer, not pinned
    assert compare_with_pins({"numpy": "2.0.0"}, {"numpy": "2.0.0", "pip": "1"})["matches"]


def test_record_carries_the_lock_files_own_hash(tmp_path):
    lock = tmp_path / "lock.txt"
    lock.write_text("numpy==2.0.0 \\\n    --hash=sha256:" + "0" * 64 + "\n", encoding="utf-8")
    record = pins_record({"numpy": "2.0.0"}, path=lock)
    # Reference: hashlib.sha256 over the file's bytes (standard library).
    assert record["sha256"] == hashlib.sha256(lock.read_bytes()).hexdigest()
    assert record["matches"] is True


def test_the_lock_file_is_found_from_the_source_tree_only(tmp_path):
    assert find_pins_file() == LOCK
    assert find_pins_file(tmp_path / "somewhere" / "module.py") is None


def test_the_audit_appendix_names_each_package_that_differs_from_the_lock():
    from trialcut.report.sections_audit import _pinned_text

    compared = compare_with_pins({"scipy": "1.14.0", "wheel": "0.45.0"}, {"scipy": "1.13.1", "six": "1.16.0"})
    text = _pinned_text({"file": "requirements/lock.txt", "sha256": "ab" * 32, **compared})
    assert "scipy 1.13.1 installed, 1.14.0 locked" in text
    assert "wheel locked but not installed" in text and "six installed but not locked" in text
    assert "every installed package" in _pinned_text({"sha256": "ab" * 32, **compare_with_pins({}, {})})
