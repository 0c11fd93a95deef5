"""Event rates: one count per participant over a period, with exposure time as an offset.

``family="negative_binomial"`` fits statsmodels' discrete ``NegativeBinomial`` (variance
``mu + alpha mu^2``, "NB2"; Cameron & Trivedi 2013, Regression Analysis of Count Data, ch. 3)
by maximum likelihood, dispersion ``alpha`` estimated with the coefficients; its standard
errors are the model-based ones.  Dispersion rule: when the maximum sits at the boundary
(``alpha`` below 1e-6 or no finite covariance: no overdispersion), the Poisson fit below is
used instead and the fit's ``notes`` and ``family`` say so.  ``family="poisson"`` fits a Poisson GLM with the robust
(sandwich, HC0) covariance, so that overdispersion does not make its intervals too narrow; its
reported dispersion is Pearson's chi-square over the residual degrees of freedom.

The rate of each arm is standardised (:mod:`trialcut.stats.standardised`): each participant's
predicted events per unit of exposure as if in that arm, averaged over the participants.  With
a log link and no arm-by-covariate term the standardised rate ratio equals ``exp`` of the arm
coefficient.  Rates and their contrasts carry a one-level ``visit`` of ``"period"``; the tables
returned here leave it out.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
from statsmodels.discrete.discrete_model import NegativeBinomial
from statsmodels.genmod import families
from statsmodels.genmod.generalized_linear_model import GLM
from statsmodels.tools.sm_exceptions import ConvergenceWarning

from trialcut.errors import FitError, Problem
from trialcut.stats import discrete_checks as checks
from trialcut.stats.standardised import RATE, StandardisedMeans, arms_in_order, frozen_array, table_dict

FAMILIES = ("negative_binomial", "poisson")
PERIOD = "period"
SUMMARY_COLUMNS = ("arm", "n", "events", "exposure", "crude_rate")
ALPHA_BOUNDARY = 1e-6
NO_OVERDISPERSION = ("the negative-binomial dispersion was estimated at its boundary (no overdispersion), where the "
                     "likelihood has no interior maximum; the Poisson model with robust variance was fitted instead")


@dataclass(frozen=True)
class RateFit:
    family: str
    arms: tuple
    reference: Any
    term_names: tuple
    estimates: np.ndarray
    covariance: np.ndarray
    means: StandardisedMeans
    dispersion: float
    dispersion_se: float | None
    n_subjects: int
    converged: bool
    summary_table: pd.DataFrame = field(repr=False)
    notes: tuple = ()

    def rates(self, confidence_level: float = 0.95) -> pd.DataFrame:
        return self.means.table(confidence_level).drop(columns="visit")

    def differences(self, effect: str | None = "rate_ratio", confidence_level: float = 0.95) -> pd.DataFrame:
        return self.means.differences(effect, confidence_level).drop(columns="visit")

    def summary(self) -> pd.DataFrame:
        return self.summary_table.copy()

    @property
    def coefficients(self) -> pd.DataFrame:
        se = np.sqrt(np.clip(np.diag(self.covariance), 0, None))
        return pd.DataFrame({"term": self.term_names, "estimate": self.estimates, "se": se})

    def to_dict(self, confidence_level: float = 0.95) -> dict[str, Any]:
        return {"family": self.family, "arms": list(self.arms), "reference": self.reference,
                "dispersion": self.dispersion, "dispersion_se": self.dispersion_se,
                "n_subjects": self.n_subjects, "converged": self.converged, "notes": list(self.notes),
                "summary": table_dict(self.summary_table), "rates": table_dict(self.rates(confidence_level)),
                "coefficients": table_dict(self.coefficients),
                "differences": {e: table_dict(self.differences(e, confidence_level))
                                for e in ("rate_ratio", "rate_difference")}}


def fit_rate(data: pd.DataFrame, *, outcome: str, arm: str, reference: Any, covariates: Sequence[str] = (),
             exposure: str | None = None, family: str = "negative_binomial") -> RateFit:
    """Rate of events per unit of exposure in each arm and their ratio to the reference arm."""
    covariates = tuple(covariates)
    problems: list[Problem] = []
    checks.require_columns(data, {"outcome": outcome, "arm": arm, "covariates": covariates, "exposure": exposure},
                           problems)
    checks.check_choice(family, "family", FAMILIES, problems)
    checks.raise_if(problems, "fit_rate")
    checks.check_reference(data, arm, reference, problems)
    checks.check_counts(data, outcome, problems)
    checks.check_exposure(data.dropna(subset=[outcome]), exposure, problems)
    checks.raise_if(problems, "fit_rate")
    frame = data.dropna(subset=[outcome, arm, *covariates] + ([exposure] if exposure else [])).reset_index(drop=True)
    arms = arms_in_order(frame[arm], reference)
    arm_values = frame[arm].to_numpy(dtype=object)
    arm_block = np.column_stack([(arm_values == a).astype(float) for a in arms[1:]])
    block, labels, levels = checks.covariate_block(frame, covariates)
    design = np.column_stack([np.ones(len(frame)), arm_block, block])
    y = frame[outcome].to_numpy(dtype=float)
    exposure_values = frame[exposure].to_numpy(dtype=float) if exposure else np.ones(len(frame))
    estimates, covariance, dispersion, dispersion_se, converged, notes = _fit(y, design, np.log(exposure_values), family)
    if not converged:
        raise FitError("fit_rate: the likelihood maximisation did not converge",
                       [Problem("rate.not_converged", "no convergence", field=outcome,
                                hint="try family='poisson' (robust variance) or fewer covariates")])
    means = _standardised(design, len(arms), estimates, covariance, arms, reference)
    summary = [(a, int((arm_values == a).sum()), float(y[arm_values == a].sum()),
                float(exposure_values[arm_values == a].sum()),
                float(y[arm_values == a].sum() / exposure_values[arm_values == a].sum())) for a in arms]
    names = ["Intercept: rate in " + str(reference)] + [f"{a} vs {reference} (log rate ratio)" for a in arms[1:]] + labels
    fitted_family = "poisson" if notes else family
    return RateFit(family=fitted_family, arms=arms, reference=reference, term_names=tuple(names),
                   estimates=frozen_array(estimates), covariance=frozen_array(covariance), means=means,
                   dispersion=dispersion, dispersion_se=dispersion_se, n_subjects=len(frame), converged=converged,
                   summary_table=pd.DataFrame(summary, columns=SUMMARY_COLUMNS), notes=notes)


def _fit(y, design, log_exposure, family):
    notes = ()
    if family == "negative_binomial":
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            fitted = _negative_binomial(y, design, log_exposure)
        if fitted is not None:
            estimates, covariance, converged = fitted
            return (estimates[:-1], covariance[:-1, :-1], float(estimates[-1]),
                    float(math.sqrt(covariance[-1, -1])), converged and not _warned(caught), ())
        notes = (NO_OVERDISPERSION,)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = GLM(y, design, family=families.Poisson(), offset=log_exposure).fit(cov_type="HC0")
        except (ValueError, np.linalg.LinAlgError) as error:
            raise FitError(f"fit_rate: statsmodels could not fit the Poisson model ({error})",
                           [Problem("rate.not_solved", str(error), hint="look for an arm without any events")]
                           ) from error
    dispersion = float(result.pearson_chi2 / result.df_resid)
    return np.asarray(result.params), np.asarray(result.cov_params()), dispersion, None, not _warned(caught), notes


def _negative_binomial(y, design, log_exposure):
    """statsmodels' NB2 fit, or None when the dispersion sits at its boundary (no overdispersion)."""
    try:
        result = NegativeBinomial(y, design, loglike_method="nb2", offset=log_exposure).fit(disp=0, maxiter=200)
        covariance = np.asarray(result.cov_params())
    except (ValueError, np.linalg.LinAlgError):
        return None
    estimates = np.asarray(result.params)
    if not (np.all(np.isfinite(covariance)) and estimates[-1] > ALPHA_BOUNDARY and covariance[-1, -1] > 0):
        return None
    return estimates, covariance, bool(result.mle_retvals.get("converged", True))


def _warned(caught) -> bool:
    return any(issubclass(w.category, ConvergenceWarning) for w in caught)


def _standardised(design, n_arms, estimates, covariance, arms, reference) -> StandardisedMeans:
    means = np.zeros((n_arms, 1))
    jacobian = np.zeros((n_arms, len(estimates)))
    for a in range(n_arms):
        rows = design.copy()
        rows[:, 1:n_arms] = 0.0
        if a:
            rows[:, a] = 1.0
        rate = np.exp(rows @ estimates)
        means[a, 0] = rate.mean()
        jacobian[a] = (rate[:, None] * rows).mean(axis=0)
    return StandardisedMeans(arms=arms, visits=(PERIOD,), reference=reference, scale=RATE,
                             estimates=frozen_array(means), covariance=frozen_array(jacobian @ covariance @ jacobian.T))
