"""Standardised (g-computation) proportions and rates per arm and visit, and their contrasts.

A model for a binary or count outcome gives, for every participant, the expected outcome had
they been assigned to each arm (their own covariates kept).  Averaging those predictions over
the participants gives the *standardised* proportion or rate of each arm: an unconditional
(marginal) quantity, unlike the model's coefficients (Ge et al. 2011, Drug Inf J 45:481-493;
the same estimator is the one recommended for unconditional treatment effects in the FDA's
2023 guidance on covariate adjustment).

Everything downstream of a fit needs only the vector of standardised means ``m`` and its
covariance ``Sigma_m``; each fit computes both eagerly and keeps no data.  Contrasts use the
delta method: a difference on the difference scale, a ratio on the log scale (interval
transformed back).  The means' own intervals are computed on the logit (proportions) or log
(rates) scale so that they stay inside the possible range.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from trialcut.errors import ModelSpecificationError, Problem

PROPORTION = "proportion"
RATE = "rate"
EFFECTS = {
    PROPORTION: ("risk_difference", "risk_ratio", "odds_ratio"),
    RATE: ("rate_ratio", "rate_difference"),
}
RATIO_EFFECTS = frozenset({"risk_ratio", "odds_ratio", "rate_ratio"})
MEAN_COLUMNS = ("arm", "visit", "estimate", "se", "lower", "upper")
DIFFERENCE_COLUMNS = ("arm", "reference", "visit", "effect", "estimate", "se", "z", "p", "lower", "upper")


def normal_quantile(confidence_level: float) -> float:
    if not (isinstance(confidence_level, (int, float)) and 0 < confidence_level < 1):
        raise ModelSpecificationError(
            f"confidence_level: expected a number between 0 and 1; got {confidence_level!r}",
            [Problem("stats.confidence_level", "confidence_level must lie between 0 and 1",
                     field="confidence_level", expected="a number between 0 and 1",
                     got=repr(confidence_level))])
    return float(stats.norm.ppf(0.5 + confidence_level / 2))


def z_test(estimate: float, se: float) -> tuple[float, float]:
    if not (se > 0 and math.isfinite(estimate)):
        return math.nan, math.nan
    z = estimate / se
    return z, float(2 * stats.norm.sf(abs(z)))


@dataclass(frozen=True)
class StandardisedMeans:
    """Standardised means per arm (rows) and visit (columns) with their joint covariance.

    ``covariance`` is indexed ``arm_index * len(visits) + visit_index``.
    """

    arms: tuple
    visits: tuple
    reference: Any
    scale: str                      # PROPORTION or RATE
    estimates: np.ndarray           # (arms, visits)
    covariance: np.ndarray          # (arms*visits, arms*visits)

    def _index(self, arm_index: int, visit_index: int) -> int:
        return arm_index * len(self.visits) + visit_index

    def table(self, confidence_level: float = 0.95) -> pd.DataFrame:
        quantile = normal_quantile(confidence_level)
        rows = []
        for a, arm in enumerate(self.arms):
            for v, visit in enumerate(self.visits):
                mean = float(self.estimates[a, v])
                index = self._index(a, v)
                se = math.sqrt(max(float(self.covariance[index, index]), 0.0))
                rows.append((arm, visit, mean, se, *self._mean_interval(mean, se, quantile)))
        return pd.DataFrame(rows, columns=MEAN_COLUMNS)

    def _mean_interval(self, mean: float, se: float, quantile: float) -> tuple[float, float]:
        if self.scale == PROPORTION:
            if not 0 < mean < 1:
                return math.nan, math.nan
            centre, half = math.log(mean / (1 - mean)), quantile * se / (mean * (1 - mean))
            return _expit(centre - half), _expit(centre + half)
        if mean <= 0:
            return math.nan, math.nan
        centre, half = math.log(mean), quantile * se / mean
        return math.exp(centre - half), math.exp(centre + half)

    def differences(self, effect: str | None = None, confidence_level: float = 0.95) -> pd.DataFrame:
        effect = check_effect(effect, self.scale)
        quantile = normal_quantile(confidence_level)
        reference_index = self.arms.index(self.reference)
        rows = []
        for a, arm in enumerate(self.arms):
            if a == reference_index:
                continue
            for v, visit in enumerate(self.visits):
                rows.append((arm, self.reference, visit, effect,
                             *self._contrast(effect, a, reference_index, v, quantile)))
        return pd.DataFrame(rows, columns=DIFFERENCE_COLUMNS)

    def _contrast(self, effect: str, a: int, r: int, v: int, quantile: float) -> tuple:
        m1, m0 = float(self.estimates[a, v]), float(self.estimates[r, v])
        i, j = self._index(a, v), self._index(r, v)
        block = self.covariance[np.ix_([i, j], [i, j])]
        value, gradient = _effect_and_gradient(effect, m1, m0)
        if not math.isfinite(value):
            return (math.nan,) * 6
        se = math.sqrt(max(float(gradient @ block @ gradient), 0.0))
        z, p = z_test(value, se)
        lower, upper = value - quantile * se, value + quantile * se
        if effect in RATIO_EFFECTS:
            return math.exp(value), se, z, p, math.exp(lower), math.exp(upper)
        return value, se, z, p, lower, upper

    def to_dict(self) -> dict[str, Any]:
        return {"arms": list(self.arms), "visits": list(self.visits), "reference": self.reference,
                "scale": self.scale, "estimates": self.estimates.tolist(),
                "covariance": self.covariance.tolist()}


def _effect_and_gradient(effect: str, m1: float, m0: float) -> tuple[float, np.ndarray]:
    """The contrast on its inference scale (log for ratios) and its gradient in (m1, m0)."""
    if effect in ("risk_difference", "rate_difference"):
        return m1 - m0, np.array([1.0, -1.0])
    if effect in ("risk_ratio", "rate_ratio"):
        if m1 <= 0 or m0 <= 0:
            return math.nan, np.zeros(2)
        return math.log(m1 / m0), np.array([1 / m1, -1 / m0])
    if not (0 < m1 < 1 and 0 < m0 < 1):
        return math.nan, np.zeros(2)
    return (math.log(m1 / (1 - m1)) - math.log(m0 / (1 - m0)),
            np.array([1 / (m1 * (1 - m1)), -1 / (m0 * (1 - m0))]))


def check_effect(effect: str | None, scale: str) -> str:
    allowed = EFFECTS[scale]
    if effect is None:
        return allowed[0]
    if effect not in allowed:
        raise ModelSpecificationError(
            f"effect: expected one of {', '.join(allowed)}; got {effect!r}",
            [Problem("stats.effect", f"this outcome's contrasts are {', '.join(allowed)}",
                     field="effect", expected=" or ".join(allowed), got=repr(effect))])
    return effect


def _expit(value: float) -> float:
    return 1.0 / (1.0 + math.exp(-value))


def frozen_array(values) -> np.ndarray:
    array = np.array(values, dtype=float)
    array.flags.writeable = False
    return array


def table_dict(frame: pd.DataFrame) -> dict[str, Any]:
    """A DataFrame as JSON-able columns and rows (NaN and infinities become None)."""
    def plain(value):
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, float) and not math.isfinite(value):
            return None
        return value
    return {"columns": [str(c) for c in frame.columns],
            "data": [[plain(v) for v in row] for row in frame.itertuples(index=False)]}


def arms_in_order(values: Sequence, reference: Any) -> tuple:
    """The reference arm first, then the others in order of first appearance."""
    seen = list(pd.unique(pd.Series(values)))
    return (reference, *[a for a in seen if a != reference])
