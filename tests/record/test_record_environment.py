"""Environment capture: complete, JSON-able, stable, and true to the running interpreter."""
from __future__ import annotations

import json
import os
import platform
import sys
from importlib import metadata

import numpy
import scipy

from trialcut.record.environment import (OPTIONAL_PACKAGES, RECORDED_PACKAGES,
                                         capture_environment)


def test_capture_is_json_and_identical_twice():
    first, second = capture_environment(), capture_environment()
    assert json.dumps(first) == json.dumps(second)   # same keys in the same order
    assert list(first["packages"]) == sorted(first["packages"])


def test_interpreter_and_machine_facts_match_the_standard_library():
    captured = capture_environment()
    # References: sys.version_info and os.cpu_count (Python standard library).
    assert captured["python"]["version"] == "{}.{}.{}".format(*sys.version_info[:3])
    assert captured["processor_count"] == os.cpu_count()
    assert captured["machine"] == platform.machine()
    assert captured["byte_order"] == sys.byteorder


def test_package_versions_match_the_packages_themselves():
    packages = capture_environment()["packages"]
    # References: each package's own __version__ attribute, independent of its metadata.
    assert packages["numpy"] == numpy.__version__
    assert packages["scipy"] == scipy.__version__
    required = [name for name in RECORDED_PACKAGES if name not in OPTIONAL_PACKAGES]
    assert all(packages[name] for name in required), packages
    for name in OPTIONAL_PACKAGES:
        try:
            installed = metadata.version(name)
        except metadata.PackageNotFoundError:
            installed = None   # optional and absent: left out, not recorded as null
        assert packages.get(name) == installed


def test_linear_algebra_libraries_are_named_without_local_paths():
    libraries = capture_environment()["linear_algebra"]
    assert libraries, "numpy always reports at least the BLAS it was built with"
    text = json.dumps(libraries)
    assert sys.prefix not in text and "site-packages" not in text
