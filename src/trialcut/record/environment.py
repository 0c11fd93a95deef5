"""The software environment of a run, recorded so a reviewer can tell what produced it.

Everything here is cheap (no subprocesses, no network) and comes out in a fixed order,
so two captures on the same machine give the same JSON.
"""
from __future__ import annotations

import os
import platform
import sys
from importlib import metadata
from typing import Any

from trialcut.record.pinned import installed_distributions, pins_record

# Distribution names as installers know them; dask, threadpoolctl are optional.
RECORDED_PACKAGES = ("dask", "jinja2", "matplotlib", "numpy", "pandas", "pyarrow", "pydantic",
                     "python-docx", "pyyaml", "rich", "scipy", "statsmodels", "threadpoolctl",
                     "trialcut", "weasyprint")
OPTIONAL_PACKAGES = ("dask", "threadpoolctl")
# Variables that change how many threads the numerical libraries use (and so, at the
# last few digits, their results).
THREAD_VARIABLES = ("MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS", "OMP_NUM_THREADS",
                    "OPENBLAS_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


def capture_environment() -> dict[str, Any]:
    distributions = installed_distributions()
    return {
        # Plain facts only: build strings and the platform module's one-line summary say
        # nothing a reviewer can act on and differ between identical installations.
        "python": {"version": platform.python_version(),
                   "implementation": platform.python_implementation()},
        "system": platform.system(),
        "machine": platform.machine(),
        "processor_count": os.cpu_count(),
        "byte_order": sys.byteorder,
        "packages": package_versions(),
        # Every installed distribution, and how they compare with the project's lock file.
        "distributions": distributions,
        "pinned": pins_record(distributions),
        "thread_settings": {name: os.environ[name] for name in THREAD_VARIABLES
                            if name in os.environ},
        "linear_algebra": linear_algebra_libraries(),
    }


def package_versions() -> dict[str, str | None]:
    """Installed version of each recorded package; a required one that is absent is None."""
    versions: dict[str, str | None] = {}
    for name in RECORDED_PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            if name not in OPTIONAL_PACKAGES:
                versions[name] = None
    return versions


def linear_algebra_libraries() -> list[dict[str, Any]]:
    """The BLAS/LAPACK libraries in use: from threadpoolctl if installed, else numpy's build.

    Each as {library, implementation, version, threads, threading, tuned_for, used_by} in our
    own keys.  threadpoolctl sees the libraries actually loaded (with their thread counts);
    numpy's build record names the library it was built against.  Local paths are left out:
    they say nothing about the numbers and differ between identical machines; only the
    package folder a library was loaded from (numpy.libs -> numpy) is kept.
    """
    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        return _numpy_build_libraries()
    found = [{"library": library.get("user_api"), "implementation": library.get("internal_api"),
              "version": library.get("version"), "threads": library.get("num_threads"),
              "threading": library.get("threading_layer"), "tuned_for": library.get("architecture"),
              "used_by": _loaded_with(library.get("filepath"))}
             for library in threadpool_info()]
    return sorted(found, key=lambda library: tuple(str(value) for value in library.values()))


def _loaded_with(filepath: str | None) -> str | None:
    """The package whose folder holds a loaded library (".../scipy.libs/libx.so" -> "scipy")."""
    if not filepath:
        return None
    parts = filepath.replace("\\", "/").split("/")
    for part in reversed(parts[:-1]):
        if part.endswith(".libs") or part.endswith(".dylibs"):
            return part.rsplit(".", 1)[0]
    for marker in ("site-packages", "dist-packages"):
        if marker in parts and parts.index(marker) + 1 < len(parts) - 1:
            return parts[parts.index(marker) + 1]
    return "the system"


def _numpy_build_libraries() -> list[dict[str, Any]]:
    try:
        import numpy
        dependencies = numpy.show_config(mode="dicts")["Build Dependencies"]
    except (ImportError, KeyError, TypeError, ValueError):
        return []   # an older numpy without the dict form: nothing cheap to record
    return [{"library": role, "implementation": details.get("name"), "version": details.get("version"),
             "threads": None, "threading": None, "tuned_for": None, "used_by": "numpy (as built)"}
            for role, details in sorted(dependencies.items()) if isinstance(details, dict)]
