"""What an analysis method receives besides its data and its plan entry."""
from __future__ import annotations

import zlib
from dataclasses import dataclass, field
from typing import Any, Callable, Protocol, Sequence

import numpy as np


class Executor(Protocol):
    """Runs ``function(item)`` for every item and returns the results in input order."""

    def map(self, function: Callable[[Any], Any], items: Sequence[Any]) -> list[Any]: ...


class InlineExecutor:
    """The default: everything in this process, in order."""

    def map(self, function, items):
        return [function(item) for item in items]


ProgressCallback = Callable[[str, int, int], None]   # (label, done, total)


@dataclass(frozen=True)
class RunContext:
    root_seed: int
    executor: Executor = field(default_factory=InlineExecutor)
    progress: ProgressCallback | None = None
    # A simulated trial reads only the comparisons with the reference and how the fit ended: a
    # method may then leave out what only a report shows (other tables, residuals, fit records).
    estimates_only: bool = False

    def seed_sequence(self, analysis_id: str) -> np.random.SeedSequence:
        """One independent stream per analysis, stable across runs and worker counts.

        The analysis id is folded in (CRC-32) so that adding an analysis to a plan does
        not change the random numbers of the others.
        """
        return np.random.SeedSequence([self.root_seed, zlib.crc32(analysis_id.encode("utf-8"))])
