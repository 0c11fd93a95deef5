"""Responders at one visit: each arm against the reference, unstratified, stratified and adjusted.

Methods (each row of ``differences()`` says which):

* ``unadjusted`` risk difference ``p1 - p0`` with the hybrid score interval of Newcombe (1998,
  Stat Med 17:873-890, his method 10: Wilson limits of each proportion combined); its ``se``,
  ``z`` and ``p`` are the Wald ones.
* ``mantel_haenszel`` risk difference over the strata, ``RD_MH = sum (a_k n0k - c_k n1k)/N_k /
  sum n1k n0k/N_k``, with the variance of Sato (1989, Biometrics 45:1323-1324), valid both for
  many sparse strata and for few large ones; Wald interval.
* ``mantel_haenszel`` odds ratio with the variance of the log odds ratio of Robins, Breslow &
  Greenland (1986, Biometrics 42:311-323), both from statsmodels' ``StratifiedTable``; interval
  on the log scale.
* ``standardised`` risk difference (g-computation; Ge et al. 2011): a logistic model of the
  outcome on the arm, the strata and the covariates; each participant's predicted probability
  in each arm, averaged.  Its variance is the mean square of the influence function
  ``IF_i = (mu1_i - mu0_i - RD) + G (X'WX/n)^-1 x_i (y_i - mu_i)``, which counts the
  variability of the covariates as well as that of the coefficients (robust to a wrong model).
  With no strata and no covariates it equals the unadjusted difference and its Wald SE.

The Cochran-Mantel-Haenszel test (no continuity correction) comes from ``StratifiedTable``.

Separation: when an arm (or an arm within a stratum the model adjusts for) has no responders
or only responders, the logistic model has no maximum-likelihood estimate.  The standardised
row then falls back to the unadjusted difference with Newcombe's hybrid score interval, and
the comparison's ``notes`` and the row's ``method`` (``unadjusted_fallback``) record it.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
from statsmodels.genmod import families
from statsmodels.genmod.generalized_linear_model import GLM
from statsmodels.stats.contingency_tables import StratifiedTable
from statsmodels.stats.proportion import proportion_confint

from trialcut.errors import Problem
from trialcut.stats import discrete_checks as checks
from trialcut.stats.standardised import arms_in_order, normal_quantile, table_dict, z_test

COUNT_COLUMNS = ("arm", "n", "responders", "proportion")
DIFFERENCE_COLUMNS = ("arm", "reference", "method", "effect", "estimate", "se", "z", "p", "lower", "upper")
TEST_COLUMNS = ("arm", "reference", "test", "statistic", "num_df", "p")
FALLBACK = "unadjusted_fallback"


@dataclass(frozen=True)
class ProportionsComparison:
    arms: tuple
    reference: Any
    strata: tuple
    covariates: tuple
    confidence_level: float
    counts_table: pd.DataFrame = field(repr=False)
    differences_table: pd.DataFrame = field(repr=False)
    tests_table: pd.DataFrame = field(repr=False)
    notes: tuple = ()

    def counts(self) -> pd.DataFrame:
        return self.counts_table.copy()

    def differences(self) -> pd.DataFrame:
        return self.differences_table.copy()

    def tests(self) -> pd.DataFrame:
        return self.tests_table.copy()

    def to_dict(self) -> dict[str, Any]:
        return {"arms": list(self.arms), "reference": self.reference, "strata": list(self.strata),
                "covariates": list(self.covariates), "confidence_level": self.confidence_level,
                "counts": table_dict(self.counts_table), "differences": table_dict(self.differences_table),
                "tests": table_dict(self.tests_table), "notes": list(self.notes)}


def compare_proportions(data: pd.DataFrame, *, outcome: str, arm: str, reference: Any, strata: Sequence[str] = (),
                        covariates: Sequence[str] = (), confidence_level: float = 0.95) -> ProportionsComparison:
    """Compare the proportion of responders (outcome 1) in each arm with the reference arm."""
    strata, covariates = tuple(strata), tuple(covariates)
    problems: list[Problem] = []
    checks.require_columns(data, {"outcome": outcome, "arm": arm, "strata": strata, "covariates": covariates},
                           problems)
    checks.raise_if(problems, "compare_proportions")
    checks.check_reference(data, arm, reference, problems)
    checks.check_binary(data, outcome, problems)
    checks.raise_if(problems, "compare_proportions")
    quantile = normal_quantile(confidence_level)
    frame = data.dropna(subset=[outcome, arm, *strata, *covariates]).copy()
    frame[outcome] = frame[outcome].astype(float)
    arms = arms_in_order(frame[arm], reference)
    counts = [(a, int((frame[arm] == a).sum()), int(frame.loc[frame[arm] == a, outcome].sum()),
               float(frame.loc[frame[arm] == a, outcome].mean())) for a in arms]
    differences, tests, notes = [], [], []
    for other in arms[1:]:
        pair = frame[frame[arm].isin([other, reference])]
        treated = (pair[arm] == other).to_numpy()
        y = pair[outcome].to_numpy()
        differences += _pair_rows(pair, y, treated, other, reference, strata, covariates, quantile, confidence_level,
                                  notes)
        tests.append(_cmh_test(y, treated, _stratum_codes(pair, strata), other, reference))
    return ProportionsComparison(arms=arms, reference=reference, strata=strata, covariates=covariates,
                                 confidence_level=confidence_level,
                                 counts_table=pd.DataFrame(counts, columns=COUNT_COLUMNS),
                                 differences_table=pd.DataFrame(differences, columns=DIFFERENCE_COLUMNS),
                                 tests_table=pd.DataFrame(tests, columns=TEST_COLUMNS), notes=tuple(notes))


def _pair_rows(pair, y, treated, other, reference, strata, covariates, quantile, confidence_level, notes):
    codes = _stratum_codes(pair, strata)
    unadjusted = newcombe_difference(int(y[treated].sum()), int(treated.sum()), int(y[~treated].sum()),
                                     int((~treated).sum()), confidence_level)
    rows = [(other, reference, "unadjusted", "risk_difference", *unadjusted)]
    rows.append((other, reference, "mantel_haenszel", "risk_difference",
                 *_wald(*mantel_haenszel_difference(y, treated, codes), quantile)))
    rows.append((other, reference, "mantel_haenszel", "odds_ratio", *_mh_odds_ratio(y, treated, codes, quantile)))
    separated = _separated_cells(y, treated, codes if strata else np.zeros(len(y), dtype=int))
    if separated:
        notes.append(f"{other} vs {reference}: separation ({separated}); the logistic model has no "
                     "maximum-likelihood estimate, so the adjusted risk difference falls back to the "
                     "unadjusted difference with Newcombe's hybrid score interval")
        rows.append((other, reference, FALLBACK, "risk_difference", *unadjusted))
    else:
        design = _logistic_design(pair, treated, strata, covariates)
        rows.append((other, reference, "standardised", "risk_difference",
                     *_wald(*standardised_difference(y, design), quantile)))
    return rows


def _wald(estimate: float, se: float, quantile: float) -> tuple:
    z, p = z_test(estimate, se)
    return estimate, se, z, p, estimate - quantile * se, estimate + quantile * se


def newcombe_difference(a: int, n1: int, c: int, n0: int, confidence_level: float = 0.95) -> tuple:
    """p1 - p0 with Wald se, z, p and Newcombe's hybrid score (method 10) interval."""
    p1, p0 = a / n1, c / n0
    l1, u1 = proportion_confint(a, n1, alpha=1 - confidence_level, method="wilson")
    l0, u0 = proportion_confint(c, n0, alpha=1 - confidence_level, method="wilson")
    difference = p1 - p0
    lower = difference - math.sqrt((p1 - l1) ** 2 + (u0 - p0) ** 2)
    upper = difference + math.sqrt((u1 - p1) ** 2 + (p0 - l0) ** 2)
    se = math.sqrt(p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0)
    z, p = z_test(difference, se)
    return difference, se, z, p, lower, upper


def mantel_haenszel_difference(y: np.ndarray, treated: np.ndarray, codes: np.ndarray) -> tuple[float, float]:
    """Mantel-Haenszel risk difference and its Sato (1989) standard error."""
    a, n1, c, n0 = (np.array(v, dtype=float) for v in zip(*[
        (y[treated & (codes == k)].sum(), (treated & (codes == k)).sum(),
         y[~treated & (codes == k)].sum(), (~treated & (codes == k)).sum()) for k in np.unique(codes)]))
    keep = (n1 > 0) & (n0 > 0)      # a stratum without both arms carries no information
    a, n1, c, n0 = a[keep], n1[keep], c[keep], n0[keep]
    total = n1 + n0
    weight = np.sum(n1 * n0 / total)
    difference = float(np.sum((a * n0 - c * n1) / total) / weight)
    p_term = (n1 ** 2 * c - n0 ** 2 * a + n1 * n0 * (n0 - n1) / 2) / total ** 2
    q_term = (a * (n0 - c) + c * (n1 - a)) / (2 * total)
    variance = (difference * p_term.sum() + q_term.sum()) / weight ** 2
    return difference, math.sqrt(max(float(variance), 0.0))


def _tables(y, treated, codes) -> list[np.ndarray]:
    """2x2 tables per stratum: rows treated / reference, columns responder / not."""
    tables = []
    for k in np.unique(codes):
        inside = codes == k
        t, r = treated & inside, ~treated & inside
        if t.sum() and r.sum():
            tables.append(np.array([[y[t].sum(), t.sum() - y[t].sum()], [y[r].sum(), r.sum() - y[r].sum()]]))
    return tables


def _mh_odds_ratio(y, treated, codes, quantile) -> tuple:
    table = StratifiedTable(_tables(y, treated, codes))
    with np.errstate(divide="ignore", invalid="ignore"):
        log_ratio, se = float(table.logodds_pooled), float(table.logodds_pooled_se)
    if not (math.isfinite(log_ratio) and math.isfinite(se)):
        return (math.nan,) * 6
    z, p = z_test(log_ratio, se)
    return math.exp(log_ratio), se, z, p, math.exp(log_ratio - quantile * se), math.exp(log_ratio + quantile * se)


def _cmh_test(y, treated, codes, other, reference) -> tuple:
    with np.errstate(divide="ignore", invalid="ignore"):
        result = StratifiedTable(_tables(y, treated, codes)).test_null_odds(correction=False)
    return other, reference, "cochran_mantel_haenszel", float(result.statistic), 1, float(result.pvalue)


def _stratum_codes(frame: pd.DataFrame, strata: Sequence[str]) -> np.ndarray:
    if not strata:
        return np.zeros(len(frame), dtype=int)
    return frame.groupby(list(strata), sort=True).ngroup().to_numpy()


def _separated_cells(y, treated, codes) -> str:
    found = []
    for k in np.unique(codes):
        for label, members in (("treated arm", treated & (codes == k)), ("reference arm", ~treated & (codes == k))):
            values = y[members]
            if len(values) and values.min() == values.max():
                where = "" if len(np.unique(codes)) == 1 else f" in stratum {k + 1}"
                found.append(f"{label}{where}: {'no responders' if values.max() == 0 else 'all responders'}")
    return "; ".join(found)


def _logistic_design(pair, treated, strata, covariates) -> tuple[np.ndarray, int]:
    block, _, _ = checks.covariate_block(pair, (*strata, *covariates),
                                         {s: tuple(sorted(pair[s].unique(), key=str)) for s in strata})
    return np.column_stack([np.ones(len(pair)), treated.astype(float), block])


def standardised_difference(y: np.ndarray, design: np.ndarray) -> tuple[float, float]:
    """g-computation risk difference (column 1 of ``design`` is the arm) and its influence-function SE."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = GLM(y, design, family=families.Binomial()).fit()
    beta = np.asarray(result.params)
    as_treated, as_reference = design.copy(), design.copy()
    as_treated[:, 1], as_reference[:, 1] = 1.0, 0.0
    mu1, mu0 = _expit(as_treated @ beta), _expit(as_reference @ beta)
    difference = float(np.mean(mu1 - mu0))
    gradient = ((mu1 * (1 - mu1))[:, None] * as_treated - (mu0 * (1 - mu0))[:, None] * as_reference).mean(axis=0)
    mu = _expit(design @ beta)
    information = (design * (mu * (1 - mu))[:, None]).T @ design / len(y)
    coefficient_influence = (design * (y - mu)[:, None]) @ np.linalg.inv(information)
    influence = (mu1 - mu0 - difference) + coefficient_influence @ gradient
    return difference, float(math.sqrt(np.sum(influence ** 2)) / len(y))


def _expit(values: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-values))

