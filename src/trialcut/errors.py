"""Every error trialcut raises on purpose, in one place.

A :class:`Problem` is one thing wrong with an input: where (file, line, column, field
path), a stable code, what was expected, what was found and how to fix it.  Errors that
come from user input carry a list of problems so that a loader can report every problem
in one pass.  The command line maps the error classes to exit statuses:
``InputError`` and subclasses -> 2, ``VerificationFailed`` -> 1, anything else -> 3.
A ``FitError`` or ``ModelSpecificationError`` raised by an analysis does not stop a run: the
run records that analysis as failed with its reason and goes on; ``trialcut run`` then exits 4
when a primary analysis failed (the run itself is complete and recorded).
"""
from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any


@dataclass(frozen=True)
class Problem:
    code: str                      # stable, dotted: "plan.unknown_key", "data.duplicate_visit"
    message: str                   # one readable sentence: what is wrong
    file: str | None = None
    line: int | None = None        # 1-based
    column: int | None = None      # 1-based
    field: str | None = None       # breadcrumb: "analyses[primary].covariance" or a column name
    expected: str | None = None
    got: str | None = None
    hint: str | None = None        # what to do, e.g. "did you mean 'unstructured'?"
    rows: tuple[Any, ...] = ()     # first offending rows/participants for data problems

    def where(self) -> str:
        place = self.file or ""
        if self.line is not None:
            place += f":{self.line}"
            if self.column is not None:
                place += f":{self.column}"
        if self.field:
            place = f"{place} {self.field}" if place else self.field
        return place

    def render(self) -> str:
        text = f"{self.where()}: " if self.where() else ""
        text += self.message
        if self.expected is not None:
            text += f"; expected {self.expected}"
        if self.got is not None:
            text += f"; got {self.got}"
        if self.hint:
            text += f" — {self.hint}"
        if self.rows:
            shown = ", ".join(str(r) for r in self.rows[:5])
            more = f" (+{len(self.rows) - 5} more)" if len(self.rows) > 5 else ""
            text += f" [first rows: {shown}{more}]"
        return text

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["rows"] = [str(r) for r in self.rows]
        return data


class TrialcutError(Exception):
    """Base class. ``exit_status`` is what the command line returns for it."""

    exit_status = 3

    def __init__(self, message: str, problems: list[Problem] | tuple[Problem, ...] = ()):
        self.problems = tuple(problems)
        super().__init__(message)

    def render(self) -> str:
        lines = [str(self)]
        lines += [f"  - {p.render()}" for p in self.problems]
        return "\n".join(lines)


class InputError(TrialcutError):
    """Bad input from the user: a plan, a lock record, a data file, a command line."""

    exit_status = 2


class PlanError(InputError):
    """The analysis plan does not load or does not validate."""


class LockError(InputError):
    """The plan is not locked, or no longer matches its lock record."""


class DataError(InputError):
    """The data cut cannot be read or fails a conformance check of severity error."""


class ModelSpecificationError(InputError):
    """Arguments to a statistical routine that cannot describe a valid model."""


class FitError(TrialcutError):
    """A model could not be fitted (every covariance structure tried failed)."""

    exit_status = 2

    def __init__(self, message: str, problems=(), attempts: list[dict[str, Any]] | None = None):
        super().__init__(message, problems)
        self.attempts = list(attempts or [])


class ConvergenceError(FitError):
    """One covariance structure did not converge."""


class RunFolderError(InputError):
    """The output location cannot take a new run folder."""


class VerificationFailed(TrialcutError):
    """A run folder or the registry chain does not match its recorded hashes."""

    exit_status = 1
