"""Tipping-point analysis: how large a shift δ of the imputed values overturns the conclusion.

For each cell of a grid — δ added to every imputed value in the active arms, and in a
two-dimensional grid δᵣ added in the reference arm too — the completed data sets are
analysed and pooled by Rubin's rules (:mod:`trialcut.stats.pooling`).  The posterior draws
and the imputations are made once: a shift is added to the same completed data sets, so a
grid costs one imputation run plus one cheap analysis per cell and imputation (the shift
approach of delta-adjusted multiple imputation; Ratitch, O'Kelly & Tosiello 2013, Pharm
Stat 12:337–347).

The tipping point is where the two-sided p-value crosses α between neighbouring grid
values, found by linear interpolation of p in δ: δ* = δᵢ + (α − pᵢ)(δᵢ₊₁ − δᵢ)/(pᵢ₊₁ − pᵢ).
Crossing α is the same event as the (1 − α) confidence interval crossing 0.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.imputation import ImputationData, participants_by_assumption, prepare_data, run_imputations
from trialcut.stats.pooling import PooledEstimate, rubin_pool

GRID_COLUMNS = ("arm", "reference", "visit", "active_shift", "reference_shift", "estimate", "se", "df",
                "t", "p", "lower", "upper", "significant")


@dataclass(frozen=True)
class TippingCell:
    arm: str
    active_shift: float
    reference_shift: float
    pooled: PooledEstimate


@dataclass(frozen=True)
class TippingPoint:
    """Along one row of the grid (fixed reference shift) for one arm."""

    arm: str
    reference_shift: float
    shift: float | None            # interpolated δ* nearest the base cell; None if no crossing
    crossings: tuple[float, ...]   # every interpolated crossing along the row
    base_shift: float              # the grid value nearest 0 whose conclusion is the base
    base_significant: bool
    statement: str


@dataclass(frozen=True)
class TippingPointResult:
    reference: str
    visit: str
    alpha: float
    cells: tuple[TippingCell, ...]
    points: tuple[TippingPoint, ...]
    settings: dict[str, Any]
    diagnostics: dict[str, Any]

    def grid(self) -> pd.DataFrame:
        rows = [(c.arm, self.reference, self.visit, c.active_shift, c.reference_shift, c.pooled.estimate,
                 c.pooled.std_error, c.pooled.df, c.pooled.t, c.pooled.p, c.pooled.lower, c.pooled.upper,
                 bool(c.pooled.p < self.alpha)) for c in self.cells]
        return pd.DataFrame(rows, columns=list(GRID_COLUMNS))

    def heat_map(self, arm: str, value: str = "p") -> pd.DataFrame:
        """Rows: reference shift; columns: active shift; cells: ``value`` (p or estimate)."""
        grid = self.grid()
        return grid[grid["arm"] == arm].pivot(index="reference_shift", columns="active_shift", values=value)

    def tipping_points(self) -> pd.DataFrame:
        return pd.DataFrame([(p.arm, p.reference_shift, p.shift, p.base_shift, p.base_significant,
                              len(p.crossings), p.statement) for p in self.points],
                            columns=["arm", "reference_shift", "tipping_shift", "base_shift", "base_significant",
                                     "crossings", "statement"])

    def differences(self) -> pd.DataFrame:
        """The base cell (shifts nearest 0) in the shape every comparative analysis shares."""
        base = {(p.arm, p.reference_shift): p.base_shift for p in self.points}
        reference_base = min({c.reference_shift for c in self.cells}, key=abs)
        chosen = [c for c in self.cells if c.reference_shift == reference_base
                  and c.active_shift == base[(c.arm, c.reference_shift)]]
        return pd.DataFrame([(c.arm, self.reference, self.visit, c.pooled.estimate, c.pooled.std_error,
                              c.pooled.df, c.pooled.t, c.pooled.p, c.pooled.lower, c.pooled.upper) for c in chosen],
                            columns=["arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper"])

    def to_dict(self) -> dict[str, Any]:
        return {
            "reference": self.reference, "visit": self.visit, "alpha": self.alpha,
            "settings": dict(self.settings), "diagnostics": dict(self.diagnostics),
            "cells": [{"arm": c.arm, "active_shift": c.active_shift, "reference_shift": c.reference_shift,
                       **c.pooled.to_dict()} for c in self.cells],
            "tipping_points": [{"arm": p.arm, "reference_shift": p.reference_shift, "shift": p.shift,
                                "crossings": list(p.crossings), "base_shift": p.base_shift,
                                "base_significant": p.base_significant, "statement": p.statement}
                               for p in self.points],
        }


def shift_scenarios(n_arms: int, n_visits: int, shifts: Sequence[float],
                    reference_shifts: Sequence[float]) -> np.ndarray:
    """(R·S, K, T) δ tables, reference shift varying slowest; arm 0 is the reference."""
    tables = np.zeros((len(reference_shifts) * len(shifts), n_arms, n_visits))
    for i, (reference_shift, shift) in enumerate((r, s) for r in reference_shifts for s in shifts):
        tables[i, 1:, :] = shift
        tables[i, 0, :] = reference_shift
    return tables


def tipping_grid(data: ImputationData, *, visit: str, shifts: Sequence[float],
                 reference_shifts: Sequence[float] | None = None, assumption: str | tuple[str, ...] = "mar",
                 n_imputations: int = 50, burn_in: int = 200, thinning: int = 10,
                 covariance_by_arm: bool = False, alpha: float = 0.05,
                 seed_sequence: np.random.SeedSequence | int = 0, chains: int = 4, executor: Any = None,
                 progress: Callable[[int, int], None] | None = None,
                 covariate_effects: str = "by_visit") -> TippingPointResult:
    """The grid on prepared data; see :func:`tipping_point` for the data-frame entry."""
    shifts = sorted(float(s) for s in shifts)
    reference_shifts = [0.0] if reference_shifts is None else sorted(float(s) for s in reference_shifts)
    _check_grid(data, visit, shifts, reference_shifts, alpha)
    seeds = seed_sequence if isinstance(seed_sequence, np.random.SeedSequence) else np.random.SeedSequence(seed_sequence)
    scenarios = shift_scenarios(len(data.arms), len(data.visits), shifts, reference_shifts)
    draws = run_imputations(data, assumption=assumption, n_imputations=n_imputations, burn_in=burn_in,
                            thinning=thinning, covariance_by_arm=covariance_by_arm, seed_sequence=seeds,
                            scenarios=scenarios, chains=chains, executor=executor, progress=progress,
                            covariate_effects=covariate_effects)
    j = data.visits.index(visit)
    cells = []
    for index, (reference_shift, shift) in enumerate((r, s) for r in reference_shifts for s in shifts):
        for k, arm in enumerate(data.arms[1:]):
            pooled = rubin_pool(draws.estimates[index, :, k, j], draws.variances[index, :, k, j],
                                complete_df=float(draws.complete_df[index, k, j]), confidence_level=1.0 - alpha)
            cells.append(TippingCell(arm, shift, reference_shift, pooled))
    points = tuple(_tipping_point(arm, r, [c for c in cells if c.arm == arm and c.reference_shift == r], alpha)
                   for arm in data.arms[1:] for r in reference_shifts)
    settings = {"assumption": assumption if isinstance(assumption, str) else "by participant",
                "participants_by_assumption": participants_by_assumption(data, assumption),
                "n_imputations": n_imputations, "burn_in": burn_in,
                "thinning": thinning, "chains": chains, "covariance_by_arm": covariance_by_arm,
                "covariates": list(data.covariate_names), "covariate_effects": covariate_effects, "shifts": shifts,
                "reference_shifts": reference_shifts, "analysis": "ancova at each visit"}
    return TippingPointResult(data.arms[0], visit, alpha, tuple(cells), points, settings, draws.diagnostics)


def _tipping_point(arm: str, reference_shift: float, row: list[TippingCell], alpha: float) -> TippingPoint:
    deltas = np.array([c.active_shift for c in row])
    p_values = np.array([c.pooled.p for c in row])
    significant = p_values < alpha
    base = int(np.argmin(np.abs(deltas)))
    crossings = []
    for i in range(len(row) - 1):
        if significant[i] != significant[i + 1]:
            slope = (deltas[i + 1] - deltas[i]) / (p_values[i + 1] - p_values[i])
            crossings.append(float(deltas[i] + (alpha - p_values[i]) * slope))
    verdict = "significant" if significant[base] else "not significant"
    if not crossings:
        statement = (f"the conclusion ({verdict} at α = {alpha:g}) does not change for δ from "
                     f"{deltas[0]:g} to {deltas[-1]:g}")
        return TippingPoint(arm, reference_shift, None, (), float(deltas[base]), bool(significant[base]), statement)
    nearest = min(crossings, key=lambda d: abs(d - deltas[base]))
    statement = f"the conclusion ({verdict} at δ = {deltas[base]:g}) changes at δ ≈ {nearest:.4g}"
    return TippingPoint(arm, reference_shift, nearest, tuple(crossings), float(deltas[base]),
                        bool(significant[base]), statement)


def _check_grid(data: ImputationData, visit, shifts, reference_shifts, alpha) -> None:
    problems = []
    if visit not in data.visits:
        problems.append(Problem(code="stats.tipping_visit", message="the analysed visit is not scheduled",
                                expected=", ".join(data.visits), got=str(visit)))
    if len(shifts) < 2 or len(set(shifts)) != len(shifts) or not np.all(np.isfinite(shifts)):
        problems.append(Problem(code="stats.tipping_shifts", message="the grid needs at least two distinct "
                                "finite shifts", got=str(shifts)))
    if len(set(reference_shifts)) != len(reference_shifts) or not np.all(np.isfinite(reference_shifts)):
        problems.append(Problem(code="stats.tipping_reference_shifts", message="reference shifts must be "
                                "distinct and finite", got=str(reference_shifts)))
    if not 0 < alpha < 1:
        problems.append(Problem(code="stats.alpha", message="α out of range", expected="0 < α < 1", got=str(alpha)))
    if problems:
        raise ModelSpecificationError("the tipping-point grid is not valid", problems)


def tipping_point(frame: pd.DataFrame, *, subject: str, arm: str, visit: str, outcome: str,
                  visits: Sequence[str], reference: str, target_visit: str, shifts: Sequence[float],
                  reference_shifts: Sequence[float] | None = None, covariates: Sequence[str] = (),
                  event: str | Mapping[Any, Any] | None = None, arms: Sequence[str] | None = None,
                  **options: Any) -> TippingPointResult:
    """Tipping-point grid from a long frame (one row per participant × scheduled visit).

    ``options`` are those of :func:`tipping_grid` (assumption, n_imputations, burn_in,
    thinning, covariance_by_arm, alpha, seed_sequence, chains, executor, progress,
    covariate_effects) and ``assumption_by_subject`` (participant -> assumption name).
    """
    data = prepare_data(frame, subject=subject, arm=arm, visit=visit, outcome=outcome, visits=visits,
                        reference=reference, covariates=covariates, event=event, arms=arms)
    by_subject = options.pop("assumption_by_subject", None)
    if by_subject:   # one assumption per participant, e.g. chosen by the reason for the event
        default = options.get("assumption", "mar")
        options["assumption"] = tuple(str(by_subject.get(s, default)) for s in data.subjects)
    return tipping_grid(data, visit=target_visit, shifts=shifts, reference_shifts=reference_shifts, **options)
