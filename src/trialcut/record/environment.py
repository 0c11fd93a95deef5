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

# Distribution names as installers know them; dask, threadpoolctl are optional.
RECORDED_PACKAGES = ("dask", "jinja2", "matplotlib", "numpy", "pandas", "pyarrow", "pydantic",
                     "pyyaml", "rich", "scipy", "statsmodels", "threadpoolctl", "trialcut",
                     "weasyprint")
OPTIONAL_PACKAGES = ("dask", "threadpoolctl")
# Variables that change how many threads the numerical libraries use (and so, at the
# last few digits, their results).
THREAD_VARIABLES = ("MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS", "OMP_NUM_THREADS",
                    "OPENBLAS_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


def capture_environment() -> dict[str, Any]:
    return {
        "python": {"version": platform.python_version(),
                   "implementation": platform.python_implementation(),
                   "build": list(platform.python_build())},
        "platform": platform.platform(),
        "system": platform.system(),
        "machine": platform.machine(),
        "processor_count": os.cpu_count(),
        "byte_order": sys.byteorder,
        "packages": package_versions(),
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

    threadpoolctl sees the libraries actually loaded (with their thread counts); numpy's
    build record names the library it was built against.  Local paths are left out: they
    say nothing about the numbers and differ between identical machines.
    """
    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        return _numpy_build_libraries()
    keys = ("user_api", "internal_api", "version", "threading_layer", "architecture",
            "num_threads")
    found = [{key: library.get(key) for key in keys} for library in threadpool_info()]
    return sorted(found, key=lambda library: tuple(str(library[key]) for key in keys))


def _numpy_build_libraries() -> list[dict[str, Any]]:
    try:
        import numpy
        dependencies = numpy.show_config(mode="dicts")["Build Dependencies"]
    except (ImportError, KeyError, TypeError, ValueError):
        return []   # an older numpy without the dict form: nothing cheap to record
    return [{"role": role, "name": details.get("name"), "version": details.get("version"),
             "source": "numpy build"}
            for role, details in sorted(dependencies.items()) if isinstance(details, dict)]
