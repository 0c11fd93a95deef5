"""The analysis of each completed data set: δ shifts, then ANCOVA at each visit or the MMRM.

Each completed data set (Schafer 1997, Analysis of Incomplete Multivariate Data, ch. 4) is
shifted by δ and analysed, giving one arm-minus-reference estimate and variance per visit
(and the complete-data df ν_com) for the hand-off to Rubin's rules in
:mod:`trialcut.stats.imputation`.  Only visits that were due are analysed.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.imputation_data import ImputationData, _full_rank

# --------------------------------------------------------------------------- shifts (δ)
def shift_matrix(data: ImputationData, delta_by_arm: np.ndarray, cumulative: bool = False) -> np.ndarray:
    """(n, T) shift added to imputed values: δ[arm, visit] on every imputed cell, or, when
    cumulative, the running sum of δ over the participant's imputed visits so far."""
    imputed = data.imputed.astype(float)
    step = delta_by_arm[data.arm_index] * imputed
    return imputed * np.cumsum(step, axis=1) if cumulative else step

@dataclass(frozen=True)
class RepeatedMeasuresAnalysis:
    """Completed data sets analysed by trialcut's repeated-measures model (``fit_mmrm``)
    instead of ANCOVA at each visit: one fit per completed data set and shift.  Covariates
    get an effect at each visit, as in the imputation model, so the two stay congenial."""

    covariance: str = "unstructured"
    df: str = "kenward_roger"
    method: str = "reml"
    covariates_by_visit: bool = True

    def analyse(self, data: ImputationData, completed: np.ndarray, shifts: np.ndarray):
        from trialcut.stats.mmrm import fit_mmrm   # imported here: the ANCOVA path never needs it

        names = [f"covariate_{i}" for i in range(data.covariates.shape[1])]
        n, t = completed.shape
        base = pd.DataFrame({"subject": np.repeat(np.arange(n), t), "visit": np.tile(np.array(data.visits), n),
                             "arm": np.repeat(np.array(data.arms)[data.arm_index], t)})
        for i, name in enumerate(names):
            base[name] = np.repeat(data.covariates[:, i], t)
        shape = (shifts.shape[0], len(data.arms) - 1, t)
        estimate, variance, df = np.empty(shape), np.empty(shape), np.empty(shape)
        for s, shift in enumerate(shifts):
            # A visit not yet due has no value to analyse: its latent draw is left out of the fit.
            values = np.where(data.due, completed + shift, np.nan)
            fit = fit_mmrm(base.assign(y=values.ravel()), outcome="y", subject="subject",
                           visit="visit", arm="arm", reference=data.arms[0], visits=list(data.visits),
                           covariates=tuple(names), covariates_by_visit=tuple(names) if self.covariates_by_visit else (),
                           covariance=self.covariance,
                           method=self.method, df=self.df)
            table = fit.differences().set_index(["arm", "visit"])
            for k, arm in enumerate(data.arms[1:]):
                rows = table.loc[arm].loc[list(data.visits)]
                estimate[s, k], variance[s, k] = rows["estimate"], rows["se"].to_numpy() ** 2
                df[s, k] = rows["df"]
        return estimate, variance, df

class AncovaCore:
    """Least squares of many outcome columns on one design: intercept, one indicator per
    non-reference arm, covariates (Snedecor & Cochran's analysis of covariance, fitted per
    visit).  The QR factors are made once per chain because the design never changes.
    Kept here rather than reusing the per-visit ANCOVA module so that worker processes do
    not import statsmodels; tests check it against statsmodels OLS."""

    def __init__(self, arm_index: np.ndarray, covariates: np.ndarray, n_arms: int):
        n = arm_index.size
        indicators = (arm_index[:, None] == np.arange(1, n_arms)[None, :]).astype(float)
        design = np.column_stack([np.ones(n), indicators, covariates])
        q, r = np.linalg.qr(design)
        if n <= design.shape[1] or not _full_rank(r, design):
            raise ModelSpecificationError("the analysis model cannot be estimated", [
                Problem(code="stats.ancova_rank", message="the analysis design is rank deficient or saturated",
                        expected=f"more than {design.shape[1]} participants and independent columns",
                        got=f"{n} participants")])
        r_inverse = np.linalg.solve(r, np.eye(design.shape[1]))
        self.design = design
        self.solver = r_inverse @ q.T                       # β̂ = R⁻¹Qᵀy
        self.arm_unscaled = np.diag(r_inverse @ r_inverse.T)[1:n_arms]
        self.df = n - design.shape[1]
        self.n_arms = n_arms

    def fit(self, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(K − 1, m) arm-minus-reference estimates and their variances s²[(XᵀX)⁻¹]ₖₖ."""
        coefficients = self.solver @ y
        residuals = y - self.design @ coefficients
        residual_variance = np.sum(residuals**2, axis=0) / self.df
        return coefficients[1:self.n_arms], np.outer(self.arm_unscaled, residual_variance)


def _analyse(core: AncovaCore, completed: np.ndarray, shifts: np.ndarray):
    """ANCOVA at every visit of every shifted data set in one product."""
    n_scenarios, n, t = shifts.shape
    outcomes = (completed[None] + shifts).transpose(1, 0, 2).reshape(n, n_scenarios * t)
    estimate, variance = core.fit(outcomes)
    return (estimate.reshape(-1, n_scenarios, t).transpose(1, 0, 2),
            variance.reshape(-1, n_scenarios, t).transpose(1, 0, 2))


class VisitAncova:
    """ANCOVA at each visit on the participants whose visit was due: visits due for the same
    participants share one :class:`AncovaCore` (all of them, when every visit is due)."""

    def __init__(self, data: ImputationData):
        due = data.due
        groups: dict[bytes, list[int]] = {}
        for j in range(due.shape[1]):
            groups.setdefault(due[:, j].tobytes(), []).append(j)
        self.parts = []
        for visits in groups.values():
            rows = np.flatnonzero(due[:, visits[0]])
            core = AncovaCore(data.arm_index[rows], data.covariates[rows], len(data.arms))
            self.parts.append((rows, np.array(visits), core))
        self.df = np.empty(due.shape[1])
        for _, visits, core in self.parts:
            self.df[visits] = core.df

    def analyse(self, completed: np.ndarray, shifts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(S, K − 1, T) estimates and variances."""
        n_scenarios, t = shifts.shape[0], completed.shape[1]
        estimate = np.empty((n_scenarios, self.parts[0][2].n_arms - 1, t))
        variance = np.empty_like(estimate)
        for rows, visits, core in self.parts:
            part = _analyse(core, completed[np.ix_(rows, visits)], shifts[:, rows][:, :, visits])
            estimate[:, :, visits], variance[:, :, visits] = part
        return estimate, variance
