"""Analysis of covariance at each visit on the participants observed there.

At one visit the model is the linear model y = Xβ + ε, ε ~ N(0, σ²I), with an intercept,
one indicator per non-reference arm (treatment coding, the reference arm as the base
level) and the covariates (numeric columns as they are; categorical columns as indicators
of every level but the first).  The arm coefficients are the adjusted differences arm
minus reference; their standard errors come from s²(XᵀX)⁻¹ with s² = RSS/(n − p) and
n − p degrees of freedom (Snedecor & Cochran, Statistical Methods, 8th ed., chapter on the
analysis of covariance; the closed form for one covariate is checked in
tests/external/test_ancova_reference.py).

Two routes compute the same numbers:
- :func:`ancova_by_visit` fits statsmodels OLS per visit and returns an :class:`AncovaResult`
  with differences and adjusted means (the supportive analysis the report shows);
- :func:`ancova_difference` is a bare numpy QR solve for code that refits the same design
  many times (multiple imputation): it takes integer arm codes and a numeric covariate
  matrix, and accepts many outcome columns at once.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from statsmodels.regression.linear_model import OLS
from scipy import stats as scipy_stats

from trialcut.errors import FitError, ModelSpecificationError, Problem

DIFFERENCE_COLUMNS = ("arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper")
MEAN_COLUMNS = ("arm", "visit", "estimate", "se", "df", "lower", "upper")
FIT_COLUMNS = ("visit", "n_subjects", "residual_df", "residual_variance")


# --- the fast core ---------------------------------------------------------------------------


@dataclass(frozen=True)
class AncovaDifference:
    """Adjusted differences (arm code k minus code 0) for k = 1..K-1.

    ``estimate`` and ``std_error`` have shape (K-1,) for one outcome vector, (K-1, m) for an
    (n, m) outcome matrix; ``df`` is the residual degrees of freedom n - p.
    """

    estimate: np.ndarray
    std_error: np.ndarray
    df: int


def ancova_difference(
    y: np.ndarray,
    arm_codes: np.ndarray,
    covariate_matrix: np.ndarray | None = None,
    *,
    n_arms: int | None = None,
) -> AncovaDifference:
    """Least-squares arm differences adjusted for covariates, by a single QR factorisation.

    ``y``: (n,) or (n, m) outcomes (m imputed data sets sharing one design).
    ``arm_codes``: (n,) integers 0..K-1, 0 the reference arm.
    ``covariate_matrix``: (n, c) numbers (categorical covariates already as indicators) or None.
    """
    y = np.asarray(y, dtype=float)
    codes = np.asarray(arm_codes)
    n = codes.shape[0]
    n_arms = int(codes.max()) + 1 if n_arms is None else n_arms
    covariates = np.empty((n, 0)) if covariate_matrix is None else np.asarray(covariate_matrix, float)
    covariates = covariates.reshape(n, -1)
    if y.shape[0] != n or covariates.shape[0] != n:
        raise ModelSpecificationError(
            "outcome, arm codes and covariates differ in length",
            [Problem(code="stats.length_mismatch", message="one value per participant in each input",
                     expected=f"{n} rows", got=f"outcome {y.shape[0]}, covariates {covariates.shape[0]}")],
        )
    indicators = (codes[:, None] == np.arange(1, n_arms)[None, :]).astype(float)
    design = np.column_stack([np.ones(n), indicators, covariates])
    coefficients, unscaled = _qr_solve(design, y)
    residual_df = n - design.shape[1]
    residuals = y - design @ coefficients
    residual_variance = np.sum(residuals**2, axis=0) / residual_df
    arm_rows = slice(1, n_arms)
    unscaled_arm = np.diag(unscaled)[arm_rows]
    if y.ndim == 1:
        std_error = np.sqrt(unscaled_arm * residual_variance)
    else:
        std_error = np.sqrt(np.outer(unscaled_arm, residual_variance))
    return AncovaDifference(coefficients[arm_rows], std_error, residual_df)


def full_rank(r: np.ndarray, design: np.ndarray, tolerance: float = 1e-10) -> bool:
    """Whether every column of ``design`` adds a direction: |r_jj| (the part of column j not
    explained by the columns before it) is compared with the column's own length, so the answer
    does not depend on the unit of a covariate (a baseline in units of 1e-12 is as good as one
    in points)."""
    lengths = np.linalg.norm(design, axis=0)
    diagonal = np.abs(np.diag(r))
    return bool(np.all(lengths > 0) and np.all(diagonal > tolerance * lengths))


def _qr_solve(design: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """β̂ = R⁻¹Qᵀy and (XᵀX)⁻¹ = R⁻¹R⁻ᵀ; refuses a rank-deficient or saturated design."""
    n, p = design.shape
    q, r = np.linalg.qr(design)
    if n <= p or not full_rank(r, design):
        raise FitError(
            "the analysis of covariance design cannot be estimated",
            [Problem(code="stats.ancova_rank", message="the design matrix is rank deficient or "
                     "leaves no residual degrees of freedom", expected=f"more than {p} participants "
                     "and linearly independent columns", got=f"{n} participants",
                     hint="check that every arm has participants and covariates vary")],
        )
    r_inverse = np.linalg.solve(r, np.eye(p))
    return r_inverse @ (q.T @ y), r_inverse @ r_inverse.T


# --- the per-visit analysis -----------------------------------------------------------------


@dataclass(frozen=True)
class AncovaResult:
    """Per-visit analysis of covariance results, as plain rows (no reference to the data)."""

    outcome: str
    reference: Any
    arms: tuple
    visits: tuple
    covariates: tuple[str, ...]
    confidence_level: float
    difference_rows: tuple[tuple, ...]
    mean_rows: tuple[tuple, ...]
    fit_rows: tuple[tuple, ...]

    def differences(self) -> pd.DataFrame:
        """Arm minus reference at each visit: estimate, se, df, t, p, lower, upper."""
        return pd.DataFrame(list(self.difference_rows), columns=list(DIFFERENCE_COLUMNS))

    def adjusted_means(self) -> pd.DataFrame:
        """Adjusted mean per arm and visit (numeric covariates at their mean over the
        participants observed at the visit; categorical covariates averaged over their
        observed proportions there)."""
        return pd.DataFrame(list(self.mean_rows), columns=list(MEAN_COLUMNS))

    def fits(self) -> pd.DataFrame:
        """Per visit: participants analysed, residual df and residual variance s²."""
        return pd.DataFrame(list(self.fit_rows), columns=list(FIT_COLUMNS))

    def to_frame(self) -> pd.DataFrame:
        """The differences table, the one every comparative analysis shares."""
        return self.differences()

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": "ancova_by_visit",
            "outcome": self.outcome,
            "reference": _plain(self.reference),
            "arms": [_plain(a) for a in self.arms],
            "visits": [_plain(v) for v in self.visits],
            "covariates": list(self.covariates),
            "confidence_level": self.confidence_level,
            "differences": _table(DIFFERENCE_COLUMNS, self.difference_rows),
            "adjusted_means": _table(MEAN_COLUMNS, self.mean_rows),
            "fits": _table(FIT_COLUMNS, self.fit_rows),
        }


def ancova_by_visit(
    frame: pd.DataFrame,
    *,
    outcome: str,
    subject: str,
    arm: str,
    visit: str,
    reference: Any,
    visits: Sequence | None = None,
    covariates: Sequence[str] = (),
    confidence_level: float = 0.95,
) -> AncovaResult:
    """Fit the analysis of covariance separately at each visit on the observed outcomes.

    A row enters a visit's fit when its outcome and every covariate are present.
    """
    covariates = tuple(covariates)
    _check_arguments(frame, outcome, subject, arm, visit, reference, covariates, confidence_level)
    visits = tuple(pd.unique(frame[visit].dropna())) if visits is None else tuple(visits)
    arms = (reference, *[a for a in pd.unique(frame[arm].dropna()) if a != reference])
    if len(arms) < 2:
        raise FitError("an analysis of covariance needs a second arm to compare with the reference", [Problem(
            code="stats.ancova_one_arm", message="the data hold one arm only", field=arm,
            expected="participants in the reference arm and at least one other arm", got=repr(arms[0]),
            hint="check the population and the arm codes of the data cut")])
    differences, means, fits = [], [], []
    for visit_level in visits:
        rows = frame[(frame[visit] == visit_level)].dropna(subset=[outcome, arm, *covariates])
        visit_fit = _fit_visit(rows, outcome, arm, arms, covariates, visit_level)
        differences += _difference_rows(visit_fit, arms, visit_level, confidence_level)
        means += _mean_rows(visit_fit, arms, visit_level, confidence_level)
        fits.append((visit_level, int(visit_fit.nobs), int(visit_fit.df_resid), float(visit_fit.scale)))
    return AncovaResult(outcome, reference, arms, visits, covariates, float(confidence_level),
                        tuple(differences), tuple(means), tuple(fits))


class _VisitFit:
    """One visit's statsmodels OLS fit plus the row of covariate averages for adjusted means."""

    def __init__(self, result, covariate_average: np.ndarray, nobs: int):
        self.result = result
        self.covariate_average = covariate_average
        self.nobs = nobs
        self.df_resid = result.df_resid
        self.scale = result.scale


def _fit_visit(rows, outcome, arm, arms, covariates, visit_level) -> _VisitFit:
    absent = [a for a in arms if not (rows[arm] == a).any()]
    if absent:
        raise FitError(
            f"no participant of some arm is observed at visit {visit_level!r}",
            [Problem(code="stats.ancova_empty_arm", message="every arm needs observed outcomes at "
                     "each visit analysed", field=str(visit_level),
                     got=", ".join(map(str, absent)))],
        )
    indicators = np.column_stack([(rows[arm] == a).to_numpy(float) for a in arms[1:]])
    covariate_block = _covariate_block(rows, covariates)
    # Covariates in their largest value's units: the OLS fit's rank and pseudo-inverse are
    # absolute, so a baseline in units of 1e26 (or 1e-12) would be dropped; the arm effects
    # and adjusted means do not depend on a covariate's units.
    largest = np.abs(covariate_block).max(axis=0, initial=0.0)
    covariate_block = covariate_block / np.where(largest > 0, largest, 1.0)
    design = np.column_stack([np.ones(len(rows)), indicators, covariate_block])
    outcomes = rows[outcome].to_numpy(float)
    _qr_solve(design, outcomes)  # refuses a rank-deficient design, which OLS's pinv would hide
    result = OLS(outcomes, design).fit()
    return _VisitFit(result, covariate_block.mean(axis=0), len(rows))


def _covariate_block(rows: pd.DataFrame, covariates: tuple[str, ...]) -> np.ndarray:
    """Numeric covariates as they are; a categorical one as indicators of all but its first
    level (sorted), so averaging a column gives that level's observed proportion."""
    blocks = [np.empty((len(rows), 0))]
    for name in covariates:
        column = rows[name]
        if _is_numeric(column):
            blocks.append(column.to_numpy(float)[:, None])
        else:
            levels = sorted(pd.unique(column), key=str)
            blocks.append(np.column_stack([(column == lv).to_numpy(float) for lv in levels[1:]])
                          if len(levels) > 1 else np.empty((len(rows), 0)))
    return np.column_stack(blocks)


def _difference_rows(visit_fit: _VisitFit, arms, visit_level, confidence_level) -> list[tuple]:
    result, df = visit_fit.result, float(visit_fit.df_resid)
    critical = scipy_stats.t.ppf(0.5 + confidence_level / 2, df)
    rows = []
    for position, arm_level in enumerate(arms[1:], start=1):
        estimate, std_error = float(result.params[position]), float(result.bse[position])
        t_value = estimate / std_error
        p_value = float(2 * scipy_stats.t.sf(abs(t_value), df))
        rows.append((arm_level, arms[0], visit_level, estimate, std_error, df, t_value, p_value,
                     estimate - critical * std_error, estimate + critical * std_error))
    return rows


def _mean_rows(visit_fit: _VisitFit, arms, visit_level, confidence_level) -> list[tuple]:
    result, df = visit_fit.result, float(visit_fit.df_resid)
    critical = scipy_stats.t.ppf(0.5 + confidence_level / 2, df)
    covariance = np.asarray(result.cov_params())
    rows = []
    for position, arm_level in enumerate(arms):
        indicators = np.zeros(len(arms) - 1)
        if position:
            indicators[position - 1] = 1.0
        weights = np.concatenate([[1.0], indicators, visit_fit.covariate_average])
        estimate = float(weights @ result.params)
        std_error = float(math.sqrt(weights @ covariance @ weights))
        rows.append((arm_level, visit_level, estimate, std_error, df,
                     estimate - critical * std_error, estimate + critical * std_error))
    return rows


def _check_arguments(frame, outcome, subject, arm, visit, reference, covariates, confidence_level):
    problems = [
        Problem(code="stats.missing_column", message=f"no column {name!r}", field=name,
                expected="a column of the data")
        for name in dict.fromkeys((outcome, subject, arm, visit, *covariates))
        if name not in frame.columns
    ]
    if not problems and not (frame[arm] == reference).any():
        problems.append(Problem(code="stats.unknown_reference", message="the reference arm is not in "
                                "the data", field=arm, expected=", ".join(map(str, pd.unique(frame[arm]))),
                                got=repr(reference)))
    if not problems and not _is_numeric(frame[outcome]):
        problems.append(Problem(code="stats.not_numeric", message="the outcome must be numeric",
                                field=outcome, got=str(frame[outcome].dtype)))
    if not problems and frame.duplicated([subject, visit]).any():
        twice = frame.loc[frame.duplicated([subject, visit], keep=False), [subject, visit]]
        problems.append(Problem(code="stats.duplicate_visit", message="one row per participant and "
                                "visit expected", field=f"{subject} x {visit}",
                                rows=tuple(twice.itertuples(index=False, name=None))))
    if not 0 < confidence_level < 1:
        problems.append(Problem(code="stats.confidence_level", message="confidence level out of range",
                                field="confidence_level", expected="a number between 0 and 1",
                                got=repr(confidence_level)))
    if problems:
        raise ModelSpecificationError("the analysis of covariance cannot be specified", problems)


def _is_numeric(column: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column)


def _plain(value: Any) -> Any:
    """A JSON-able scalar: numpy scalars unwrapped, NaN and infinities as None."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _table(columns: Sequence[str], rows: Sequence[tuple]) -> dict[str, Any]:
    return {"columns": list(columns), "data": [[_plain(v) for v in row] for row in rows]}
