"""Generalized estimating equations for repeated binary and count outcomes.

The model (Liang & Zeger 1986, Biometrika 73:13-22) has an intercept, the arm, the visit, the
arm-by-visit interaction and the covariates, with a logit link for ``binomial`` and a log link
for ``poisson`` and ``negative_binomial``.  statsmodels' ``GEE`` solves the estimating
equations; this module adds what a trial report needs on top of it:

* **Variance.** The robust (sandwich) covariance by default.  ``small_sample="mancl_derouen"``
  uses the bias-reduced sandwich of Mancl & DeRouen (2001, Biometrics 57:126-134), which
  statsmodels computes as ``cov_type="bias_reduced"``.  Tests and intervals use the normal
  distribution in both cases.
* **Negative-binomial dispersion rule.** The working variance is ``mu + alpha mu^2``.  ``alpha``
  is the method-of-moments value from a first Poisson fit, ``alpha = sum((y - mu)^2 - mu) /
  sum(mu^2)`` over all analysed rows (floored at 1e-8), held fixed while the estimating
  equations are solved again.  The robust covariance keeps inference valid whatever ``alpha``.
* **Standardised means** (:mod:`trialcut.stats.standardised`): each participant's predicted
  proportion (or rate per unit of exposure, offset 0) as if in each arm at each visit, averaged
  over the participants in the fit (each once, with the covariates of their first analysed
  row).  Their covariance is ``J V J'`` (delta method conditional on the observed covariates).
* **Joint tests** are Wald chi-square tests on the linear-predictor scale: ``arm`` the arm
  effect averaged over visits (equal weights), ``visit`` the visit effect averaged over arms,
  ``arm_by_visit`` the interaction, each covariate all its coefficients.
* **Separation.** When every participant of an arm at a visit has the same binary outcome
  (for example an arm with no responders), the logit coefficients do not exist; the fit stops
  with a ``FitError`` (code ``gee.separation``) naming the cells, so that the caller can fall
  back to an exact or score method for that visit and record it.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
from statsmodels.genmod import families
from statsmodels.genmod.generalized_estimating_equations import GEE
from scipy import stats
from statsmodels.genmod import cov_struct as working
from statsmodels.tools.sm_exceptions import ConvergenceWarning

from trialcut.errors import FitError, Problem
from trialcut.stats import discrete_checks as checks
from trialcut.stats.standardised import (PROPORTION, RATE, StandardisedMeans, arms_in_order, frozen_array,
                                         normal_quantile, table_dict, z_test)

FAMILIES = ("binomial", "poisson", "negative_binomial")
CORRELATIONS = ("independence", "exchangeable", "ar1", "unstructured")
SMALL_SAMPLE_METHODS = ("mancl_derouen",)
COEFFICIENT_COLUMNS = ("term", "estimate", "se", "z", "p", "lower", "upper")
JOINT_COLUMNS = ("term", "num_df", "chi_square", "p")
DISPERSION_FLOOR = 1e-8


@dataclass(frozen=True)
class GEEFit:
    family: str
    correlation: str
    small_sample: str | None
    arms: tuple
    visits: tuple
    reference: Any
    term_names: tuple
    term_keys: tuple
    estimates: np.ndarray
    covariance: np.ndarray
    means: StandardisedMeans
    joint_contrasts: tuple          # (name, contrast matrix) pairs
    n_subjects: int
    n_obs: int
    n_left_out: int
    converged: bool
    iterations: int
    working_correlation: float | None
    dispersion: float | None
    notes: tuple = field(default=())

    @property
    def coefficients(self) -> pd.DataFrame:
        quantile = normal_quantile(0.95)
        rows = []
        for name, estimate, variance in zip(self.term_names, self.estimates, np.diag(self.covariance)):
            se = math.sqrt(max(float(variance), 0.0))
            rows.append((name, float(estimate), se, *z_test(float(estimate), se),
                         float(estimate) - quantile * se, float(estimate) + quantile * se))
        return pd.DataFrame(rows, columns=COEFFICIENT_COLUMNS)

    def marginal_means(self, confidence_level: float = 0.95) -> pd.DataFrame:
        return self.means.table(confidence_level)

    def differences(self, effect: str | None = None, confidence_level: float = 0.95) -> pd.DataFrame:
        return self.means.differences(effect, confidence_level)

    def joint_tests(self) -> pd.DataFrame:
        rows = []
        for name, contrast in self.joint_contrasts:
            value = contrast @ self.estimates
            middle = contrast @ self.covariance @ contrast.T
            statistic = float(value @ np.linalg.pinv(middle) @ value)
            rank = int(np.linalg.matrix_rank(middle))
            rows.append((name, rank, statistic, float(stats.chi2.sf(statistic, rank))))
        return pd.DataFrame(rows, columns=JOINT_COLUMNS)

    def to_dict(self, confidence_level: float = 0.95) -> dict[str, Any]:
        effects = ("risk_difference", "risk_ratio", "odds_ratio") if self.family == "binomial" \
            else ("rate_ratio", "rate_difference")
        return {"family": self.family, "correlation": self.correlation, "small_sample": self.small_sample,
                "arms": list(self.arms), "visits": list(self.visits), "reference": self.reference,
                "n_subjects": self.n_subjects, "n_obs": self.n_obs, "n_left_out": self.n_left_out,
                "converged": self.converged, "iterations": self.iterations,
                "working_correlation": self.working_correlation, "dispersion": self.dispersion,
                "notes": list(self.notes), "term_keys": [dict(k) for k in self.term_keys],
                "coefficients": table_dict(self.coefficients),
                "marginal_means": table_dict(self.marginal_means(confidence_level)),
                "differences": {e: table_dict(self.differences(e, confidence_level)) for e in effects},
                "joint_tests": table_dict(self.joint_tests())}


# =========================================================================== fitting
def fit_gee(data: pd.DataFrame, *, outcome: str, subject: str, visit: str, arm: str, reference: Any,
            visits: Sequence | None = None, covariates: Sequence[str] = (), family: str = "binomial",
            correlation: str = "exchangeable", offset: str | None = None,
            small_sample: str | None = None) -> GEEFit:
    """Fit a GEE with arm, visit, arm-by-visit and covariates (see the module docstring).

    ``offset`` names a column added to the linear predictor as it is (for counts: the log of
    each row's exposure time); the standardised rates are then per unit of exposure.
    """
    covariates = tuple(covariates)
    _check(data, outcome, subject, visit, arm, reference, covariates, family, correlation, offset, small_sample)
    visits = tuple(visits) if visits is not None else tuple(dict.fromkeys(data[visit].dropna()))
    frame, n_left_out = _analysed_rows(data, outcome, subject, visit, arm, visits, covariates, offset)
    arms = arms_in_order(frame[arm], reference)
    if family == "binomial":
        _check_separation(frame, outcome, arm, visit, arms, visits)
    design = _Design(frame, arm, visit, arms, visits, covariates)
    result, dispersion, notes = _solve(frame, design, outcome, subject, visit, visits, family, correlation,
                                       offset, small_sample)
    estimates = np.asarray(result.params, dtype=float)
    covariance = np.asarray(result.cov_params(), dtype=float)
    first_rows = frame.drop_duplicates(subject)
    means = _standardised_means(design, first_rows, estimates, covariance, family)
    return GEEFit(family=family, correlation=correlation, small_sample=small_sample, arms=arms, visits=visits,
                  reference=reference, term_names=tuple(design.labels), term_keys=tuple(design.keys),
                  estimates=frozen_array(estimates), covariance=frozen_array(covariance), means=means,
                  joint_contrasts=tuple(design.joint_contrasts()), n_subjects=int(frame[subject].nunique()),
                  n_obs=len(frame), n_left_out=n_left_out, converged=bool(result.converged),
                  iterations=len(result.fit_history["params"]) - 1,
                  working_correlation=_working_correlation(result, correlation),
                  dispersion=dispersion, notes=tuple(notes))


def _check(data, outcome, subject, visit, arm, reference, covariates, family, correlation, offset, small_sample):
    problems: list[Problem] = []
    checks.require_columns(data, {"outcome": outcome, "subject": subject, "visit": visit, "arm": arm,
                                  "covariates": covariates, "offset": offset}, problems)
    checks.check_choice(family, "family", FAMILIES, problems)
    checks.check_choice(correlation, "correlation", CORRELATIONS, problems)
    if small_sample is not None:
        checks.check_choice(small_sample, "small_sample", SMALL_SAMPLE_METHODS, problems)
    checks.raise_if(problems, "fit_gee")
    checks.check_reference(data, arm, reference, problems)
    (checks.check_binary if family == "binomial" else checks.check_counts)(data, outcome, problems)
    checks.raise_if(problems, "fit_gee")


def _analysed_rows(data, outcome, subject, visit, arm, visits, covariates, offset) -> tuple[pd.DataFrame, int]:
    needed = [outcome, arm, *covariates] + ([offset] if offset else [])
    frame = data[data[visit].isin(visits)]
    kept = frame.dropna(subset=needed)
    order = {v: i for i, v in enumerate(visits)}
    kept = kept.assign(_visit_index=kept[visit].map(order))
    # statsmodels expects each participant's rows together, in time order.
    kept = kept.sort_values([subject, "_visit_index"], kind="stable").reset_index(drop=True)
    left_out = set(frame[subject]) - set(kept[subject])
    if kept.empty:
        raise FitError("fit_gee: no row has an outcome and every covariate",
                       [Problem("gee.no_data", "nothing to fit", field=outcome)])
    return kept, len(left_out)


def _check_separation(frame, outcome, arm, visit, arms, visits) -> None:
    cells = frame.groupby([arm, visit], sort=False)[outcome].agg(["min", "max"])
    flat = [f"{a} at {v} ({'no responders' if row['max'] == 0 else 'all responders'})"
            for (a, v), row in cells.iterrows() if row["min"] == row["max"]]
    if flat:
        raise FitError(
            "fit_gee: separation — " + "; ".join(flat) + ": the logit model's coefficients do not exist",
            [Problem("gee.separation", f"every participant of {cell} has the same outcome", field=outcome,
                     hint="analyse that visit with an exact or score interval for the unadjusted difference")
             for cell in flat])


class _Design:
    """Columns: intercept, arm, visit, arm-by-visit, covariates (reference arm and first visit omitted)."""

    def __init__(self, frame, arm, visit, arms, visits, covariates):
        self.arm, self.visit, self.arms, self.visits, self.covariates = arm, visit, arms, visits, covariates
        _, covariate_labels, self.levels = checks.covariate_block(frame, covariates)
        reference, first = arms[0], visits[0]
        self.labels = [f"Intercept: {reference} at {first}"]
        self.keys = [{"effect": "intercept"}]
        for a in arms[1:]:
            self.labels.append(f"{a} vs {reference} at {first}")
            self.keys.append({"effect": "arm", "arm": a})
        for v in visits[1:]:
            self.labels.append(f"{v} vs {first} in {reference}")
            self.keys.append({"effect": "visit", "visit": v})
        for a in arms[1:]:
            for v in visits[1:]:
                self.labels.append(f"{a} vs {reference}, {v} minus {first}")
                self.keys.append({"effect": "arm_by_visit", "arm": a, "visit": v})
        self.covariate_start = len(self.labels)
        self.labels += covariate_labels
        self.keys += [{"effect": "covariate", "term": label} for label in covariate_labels]
        self.matrix = self.rows(frame[arm].to_numpy(), frame[visit].to_numpy(), frame)

    def rows(self, arm_values, visit_values, covariate_frame) -> np.ndarray:
        arm_values, visit_values = np.asarray(arm_values, dtype=object), np.asarray(visit_values, dtype=object)
        columns = [np.ones(len(covariate_frame))]
        arm_columns = [(arm_values == a).astype(float) for a in self.arms[1:]]
        visit_columns = [(visit_values == v).astype(float) for v in self.visits[1:]]
        columns += arm_columns + visit_columns
        columns += [a * v for a in arm_columns for v in visit_columns]
        block, _, _ = checks.covariate_block(covariate_frame, self.covariates, self.levels)
        return np.hstack([np.column_stack(columns), block])

    def joint_contrasts(self) -> list[tuple[str, np.ndarray]]:
        n_arms, n_visits, width = len(self.arms) - 1, len(self.visits) - 1, len(self.labels)
        arm_at, visit_at = 1, 1 + n_arms
        interaction_at = visit_at + n_visits
        contrasts = []
        if n_arms:
            arm = np.zeros((n_arms, width))
            for i in range(n_arms):
                arm[i, arm_at + i] = 1.0
                arm[i, interaction_at + i * n_visits: interaction_at + (i + 1) * n_visits] = 1.0 / (n_visits + 1)
            contrasts.append(("arm", arm))
        if n_visits:
            visit = np.zeros((n_visits, width))
            for j in range(n_visits):
                visit[j, visit_at + j] = 1.0
                for i in range(n_arms):
                    visit[j, interaction_at + i * n_visits + j] = 1.0 / (n_arms + 1)
            contrasts.append(("visit", visit))
        if n_arms and n_visits:
            contrasts.append(("arm_by_visit", np.eye(width)[interaction_at: interaction_at + n_arms * n_visits]))
        position = self.covariate_start
        for column in self.covariates:
            count = len(self.levels[column]) - 1 if column in self.levels else 1
            if count:
                contrasts.append((str(column), np.eye(width)[position: position + count]))
            position += count
        return contrasts


def _statsmodels_family(family: str, dispersion: float | None):
    if family == "binomial":
        return families.Binomial()
    if family == "poisson":
        return families.Poisson()
    return families.NegativeBinomial(alpha=dispersion)


def _working(correlation: str):
    return {"independence": working.Independence, "exchangeable": working.Exchangeable,
            "ar1": lambda: working.Autoregressive(grid=False), "unstructured": working.Unstructured}[correlation]()


def _solve(frame, design, outcome, subject, visit, visits, family, correlation, offset, small_sample):
    """statsmodels' GEE on our design; for the negative binomial the dispersion rule first."""
    y = frame[outcome].to_numpy(dtype=float)
    groups = pd.factorize(frame[subject])[0]
    time = frame["_visit_index"].to_numpy(dtype=np.int64)[:, None]
    offset_values = frame[offset].to_numpy(dtype=float) if offset else None
    cov_type = "bias_reduced" if small_sample == "mancl_derouen" else "robust"
    notes, dispersion, start = [], None, None
    if family == "negative_binomial":
        first = _gee(y, design.matrix, groups, time, "poisson", None, correlation, offset_values, cov_type, None)
        mu = np.asarray(first.fittedvalues, dtype=float)
        dispersion = max(float(np.sum((y - mu) ** 2 - mu) / np.sum(mu ** 2)), DISPERSION_FLOOR)
        start = np.asarray(first.params)
        if dispersion == DISPERSION_FLOOR:
            notes.append("no overdispersion beyond the Poisson was seen; the dispersion was set to its floor")
    result = _gee(y, design.matrix, groups, time, family, dispersion, correlation, offset_values, cov_type, start)
    if not result.converged:
        raise FitError("fit_gee: the estimating equations did not converge",
                       [Problem("gee.not_converged", "no convergence within the iteration limit",
                                hint="try correlation='independence' or fewer covariates")])
    return result, dispersion, notes


def _gee(y, matrix, groups, time, family, dispersion, correlation, offset_values, cov_type, start):
    model = GEE(y, matrix, groups=groups, time=time, family=_statsmodels_family(family, dispersion),
                   cov_struct=_working(correlation), offset=offset_values)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = model.fit(maxiter=100, cov_type=cov_type, start_params=start)
        except (ValueError, np.linalg.LinAlgError) as error:
            # statsmodels stops this way when a working correlation cannot be estimated.
            raise FitError(f"fit_gee: statsmodels could not solve the estimating equations ({error})",
                           [Problem("gee.not_solved", str(error), field=correlation,
                                    hint="try correlation='exchangeable' or 'independence'")]) from error
    # statsmodels says so by a ConvergenceWarning when the parameter updates never settle.
    result.converged = not any(issubclass(w.category, ConvergenceWarning) for w in caught)
    return result


def _working_correlation(result, correlation: str) -> float | None:
    parameter = result.cov_struct.dep_params
    if correlation in ("exchangeable", "ar1"):
        return float(parameter)
    return None


def _standardised_means(design: _Design, first_rows: pd.DataFrame, estimates, covariance, family) -> StandardisedMeans:
    n_arms, n_visits = len(design.arms), len(design.visits)
    means = np.zeros((n_arms, n_visits))
    jacobian = np.zeros((n_arms * n_visits, len(estimates)))
    n = len(first_rows)
    for a, arm in enumerate(design.arms):
        for v, visit in enumerate(design.visits):
            rows = design.rows(np.full(n, arm, dtype=object), np.full(n, visit, dtype=object), first_rows)
            eta = rows @ estimates
            if family == "binomial":
                mu = 1.0 / (1.0 + np.exp(-eta))
                slope = mu * (1 - mu)
            else:
                mu = np.exp(eta)
                slope = mu
            means[a, v] = mu.mean()
            jacobian[a * n_visits + v] = (slope[:, None] * rows).mean(axis=0)
    return StandardisedMeans(arms=design.arms, visits=design.visits, reference=design.arms[0],
                             scale=PROPORTION if family == "binomial" else RATE,
                             estimates=frozen_array(means),
                             covariance=frozen_array(jacobian @ covariance @ jacobian.T))
