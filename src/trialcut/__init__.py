"""trialcut: locked analysis plans, checked data cuts and recorded repeated-measures analyses."""
from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__", "fit_mmrm"]


def __getattr__(name: str):
    # Import the engine lazily so that `trialcut --help` stays quick.
    if name == "fit_mmrm":
        from trialcut.stats.mmrm import fit_mmrm

        return fit_mmrm
    raise AttributeError(name)
