"""The scenarios file of ``trialcut simulate``: what each simulated trial looks like.

A scenario declares the trial a locked plan will meet: participants per arm, the baseline
distribution, the true mean change from baseline per arm and visit, the standard deviations
and the correlation of the changes between visits, dropout and intercurrent events per arm and
visit with a missing-data mechanism, the data cut-off, and which of the plan's sensitivity
analyses to run beside the primary one.  Its shape is checked here (pydantic, like the plan);
``load_scenarios`` reports every problem with its file, line and field and checks the names
against the plan (arms, visits, analyses, intercurrent events).

Missing-data mechanisms (Little & Rubin, Statistical Analysis with Missing Data, 3rd ed. 2019,
ch. 1): ``completely_at_random`` (leaving does not depend on any value), ``at_random_last_value``
(the log-odds of leaving before a visit move by ``slope`` per standard deviation of the last
observed change: depends on observed data only) and ``not_at_random_shift`` (as at random, and
each value after leaving is shifted by ``shift``, a difference no observed value reveals).
"""
from __future__ import annotations

from typing import Annotated, Literal

import numpy as np
from pydantic import Field, model_validator

from trialcut.plan.schema import Identifier, RuleIssue, Strict, _raise_issues

SCENARIOS_FORMAT_VERSION = 1

Probability = Annotated[float, Field(ge=0, le=1)]
PositiveNumber = Annotated[float, Field(gt=0)]
# arm code -> visit label -> value
ByArmAndVisit = dict[str, dict[str, float]]
RatesByArmAndVisit = dict[str, dict[str, Probability]]
MECHANISMS = ("completely_at_random", "at_random_last_value", "not_at_random_shift")


class Baseline(Strict):
    mean: float
    sd: PositiveNumber
    lower: float | None = Field(default=None, description="Values below are set to this bound (a score's floor).")
    upper: float | None = Field(default=None, description="Values above are set to this bound (a score's ceiling).")


class Correlation(Strict):
    """Exactly one of: the same correlation between every two visits, a first-order
    autoregressive correlation per visit step, or the full matrix in the plan's visit order."""

    exchangeable: float | None = Field(default=None, ge=-1, le=1)
    autoregressive: float | None = Field(default=None, ge=-1, le=1)
    matrix: tuple[tuple[float, ...], ...] | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> "Correlation":
        given = [name for name in ("exchangeable", "autoregressive", "matrix") if getattr(self, name) is not None]
        if len(given) != 1:
            _raise_issues([RuleIssue((), "give exactly one of exchangeable, autoregressive or matrix",
                                     expected="one key", got=", ".join(given) or "none",
                                     code="scenarios.correlation")])
        return self

    def for_visits(self, count: int) -> np.ndarray:
        if self.exchangeable is not None:
            return np.full((count, count), self.exchangeable) + (1 - self.exchangeable) * np.eye(count)
        if self.autoregressive is not None:
            steps = np.abs(np.subtract.outer(np.arange(count), np.arange(count)))
            return self.autoregressive ** steps
        return np.asarray(self.matrix, dtype=float)


class Dropout(Strict):
    mechanism: Literal["completely_at_random", "at_random_last_value", "not_at_random_shift"]
    rates: RatesByArmAndVisit = Field(description=(
        "arm -> visit -> probability of leaving the study before that visit, among those still in it."))
    slope: float = Field(default=0.0, description=(
        "Change in the log-odds of leaving per standard deviation of the last observed change "
        "(at_random_last_value and not_at_random_shift); positive: higher values leave more often."))
    shift: float = Field(default=0.0, description="not_at_random_shift: added to every value after leaving.")


class EventRates(Strict):
    event: Identifier = Field(description="An intercurrent event of the plan.")
    rates: RatesByArmAndVisit = Field(description=(
        "arm -> visit -> probability that the event happens before that visit, among those without it."))
    reason: str | None = Field(default=None, description=(
        "The value written in the plan's reason column for an imputation analysis (e.g. 'Adverse event')."))


class Scenario(Strict):
    id: Identifier
    label: str | None = None
    participants_per_arm: dict[str, Annotated[int, Field(ge=2)]]
    baseline: Baseline
    mean_change: ByArmAndVisit = Field(description="arm -> visit -> true mean change from baseline.")
    sd: dict[str, PositiveNumber] = Field(description="visit -> standard deviation of the change.")
    correlation: Correlation
    dropout: Dropout | None = None
    intercurrent_events: tuple[EventRates, ...] = ()
    analyses: tuple[Identifier, ...] = Field(default=(), description=(
        "Sensitivity analyses of the plan to run beside the primary one."))
    enrolment_days: int = Field(default=0, ge=0, description="Randomisations spread evenly over this many days.")
    cut_off_day: int | None = Field(default=None, ge=0, description=(
        "Day of the data cut-off after the first randomisation; default: after every participant's last visit."))

    @model_validator(mode="after")
    def _positive_definite(self) -> "Scenario":
        matrix = self.correlation.for_visits(len(self.sd))
        issues = []
        if self.correlation.matrix is not None and matrix.shape != (len(self.sd), len(self.sd)):
            issues.append(RuleIssue(("correlation", "matrix"), "the correlation matrix must have one row and "
                                    "one column per visit of sd", expected=f"{len(self.sd)} x {len(self.sd)}",
                                    got=" x ".join(map(str, matrix.shape)) if matrix.ndim == 2 else "ragged rows",
                                    code="scenarios.correlation_shape"))
        elif not _positive_definite(matrix):
            issues.append(RuleIssue(("correlation",), "the correlation between visits is not positive definite",
                                    expected="a symmetric matrix with ones on the diagonal and positive eigenvalues",
                                    got=f"smallest eigenvalue {_smallest_eigenvalue(matrix):.3g}",
                                    hint="lower the correlations, or check that the matrix is symmetric",
                                    code="scenarios.not_positive_definite"))
        _raise_issues(issues)
        return self


def _positive_definite(matrix: np.ndarray) -> bool:
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1] or not np.allclose(matrix, matrix.T):
        return False
    if not np.allclose(np.diag(matrix), 1.0):
        return False
    return _smallest_eigenvalue(matrix) > 1e-10


def _smallest_eigenvalue(matrix: np.ndarray) -> float:
    try:
        return float(np.linalg.eigvalsh((matrix + matrix.T) / 2).min())
    except (np.linalg.LinAlgError, ValueError):
        return float("nan")


class ScenariosFile(Strict):
    format: Literal[1] = Field(description="Format of the scenarios file (1).")
    seed: int | None = Field(default=None, ge=0, description="Root seed of the simulation; default: the plan's seed.")
    scenarios: tuple[Scenario, ...] = Field(min_length=1)

    @model_validator(mode="after")
    def _unique_ids(self) -> "ScenariosFile":
        ids = [s.id for s in self.scenarios]
        _raise_issues(RuleIssue(("scenarios", index, "id"), f"scenario id {name!r} is used twice",
                                code="scenarios.duplicate_id")
                      for index, name in enumerate(ids) if name in ids[:index])
        return self
