"""trialcut: locked analysis plans, checked data cuts and recorded repeated-measures analyses."""
from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__", "fit_mmrm", "fit_gee", "fit_rate", "compare_proportions"]

_ENGINE = {
    "fit_mmrm": "trialcut.stats.mmrm",
    "fit_gee": "trialcut.stats.gee",
    "fit_rate": "trialcut.stats.rates",
    "compare_proportions": "trialcut.stats.proportions",
}


def __getattr__(name: str):
    # Import the engine lazily so that `trialcut --help` stays quick.
    if name in _ENGINE:
        import importlib

        return getattr(importlib.import_module(_ENGINE[name]), name)
    raise AttributeError(name)
