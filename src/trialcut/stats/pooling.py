"""Combining the analyses of m completed data sets: Rubin's rules with small-sample df.

Symbols follow Rubin (1987, Multiple Imputation for Nonresponse in Surveys, ch. 3) and
Barnard & Rubin (1999, Biometrika 86:948–955):

    Q̄ = mean of the m estimates Q̂ₗ          Ū = mean of the m within variances Uₗ
    B = sample variance of the Q̂ₗ (divisor m − 1)
    T = Ū + (1 + 1/m) B                      r = (1 + 1/m) B / Ū
    λ = (1 + 1/m) B / T                      ν_old = (m − 1) / λ²
    ν_obs = (ν_com + 1) / (ν_com + 3) · ν_com · (1 − λ)
    ν = 1 / (1/ν_old + 1/ν_obs)              (Barnard–Rubin; ν_old when ν_com is not given)
    γ = (r + 2/(ν + 3)) / (r + 1)             fraction of missing information
    relative efficiency = 1 / (1 + γ/m)

When nothing was imputed (B = 0) every completed data set is the same data set, so the
pooled analysis is the complete-data analysis and keeps its own df ν_com (common practice:
the Barnard–Rubin factor (ν_com + 1)/(ν_com + 3) exists to correct for estimated missing
information, of which there is none).
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy import stats as scipy_stats

from trialcut.errors import ModelSpecificationError, Problem


@dataclass(frozen=True)
class PooledEstimate:
    estimate: float                       # Q̄
    std_error: float                      # √T
    df: float                             # ν (inf when neither B nor ν_com bounds it)
    t: float
    p: float                              # two-sided
    lower: float
    upper: float
    confidence_level: float
    within_variance: float                # Ū
    between_variance: float               # B
    total_variance: float                 # T
    relative_increase: float              # r
    proportion_due_to_missing: float      # λ
    fraction_missing_information: float   # γ
    relative_efficiency: float
    n_imputations: int
    complete_df: float | None             # ν_com

    def to_dict(self) -> dict[str, Any]:
        return {key: _plain_number(value) for key, value in asdict(self).items()}


def _plain_number(value: Any) -> Any:
    if isinstance(value, float) and math.isinf(value):
        return "inf"   # JSON has no infinity; the string is unambiguous and round-trips via float()
    return value


def rubin_pool(estimates, variances, complete_df: float | None = None,
               confidence_level: float = 0.95) -> PooledEstimate:
    """Pool one scalar estimand over m ≥ 2 completed-data analyses."""
    q = np.asarray(estimates, dtype=float).ravel()
    u = np.asarray(variances, dtype=float).ravel()
    _check(q, u, complete_df, confidence_level)
    m = q.size
    identical = bool(np.all(q == q[0]))   # the mean of equal floats can miss them by one bit
    q_bar = float(q[0]) if identical else float(q.mean())
    u_bar = float(u[0]) if np.all(u == u[0]) else float(u.mean())
    b = 0.0 if identical else float(q.var(ddof=1))
    total = u_bar + (1.0 + 1.0 / m) * b
    r = (1.0 + 1.0 / m) * b / u_bar if u_bar > 0 else math.inf
    lam = (1.0 + 1.0 / m) * b / total if total > 0 else 0.0
    nu = _degrees_of_freedom(m, lam, b, complete_df)
    gamma = (r + 2.0 / (nu + 3.0)) / (r + 1.0) if math.isfinite(r) else 1.0
    if b == 0.0:
        gamma = 0.0   # no imputation happened: no missing information
    se = math.sqrt(total)
    t_value = q_bar / se if se > 0 else math.copysign(math.inf, q_bar) if q_bar else math.nan
    p_value, quantile = _t_tail(t_value, nu, confidence_level)
    return PooledEstimate(
        estimate=q_bar, std_error=se, df=nu, t=t_value, p=p_value,
        lower=q_bar - quantile * se, upper=q_bar + quantile * se, confidence_level=confidence_level,
        within_variance=u_bar, between_variance=b, total_variance=total,
        relative_increase=r, proportion_due_to_missing=lam,
        fraction_missing_information=gamma, relative_efficiency=1.0 / (1.0 + gamma / m),
        n_imputations=m, complete_df=None if complete_df is None else float(complete_df),
    )


def _degrees_of_freedom(m: int, lam: float, b: float, complete_df: float | None) -> float:
    if b == 0.0:
        return math.inf if complete_df is None else float(complete_df)
    nu_old = (m - 1) / lam**2
    if complete_df is None or not math.isfinite(complete_df):
        return nu_old
    nu_com = float(complete_df)
    nu_obs = (nu_com + 1.0) / (nu_com + 3.0) * nu_com * (1.0 - lam)
    return 1.0 / (1.0 / nu_old + 1.0 / nu_obs)


def _t_tail(t_value: float, nu: float, confidence_level: float) -> tuple[float, float]:
    alpha = 1.0 - confidence_level
    if math.isinf(nu):
        return float(2.0 * scipy_stats.norm.sf(abs(t_value))), float(scipy_stats.norm.ppf(1 - alpha / 2))
    return (float(2.0 * scipy_stats.t.sf(abs(t_value), nu)),
            float(scipy_stats.t.ppf(1 - alpha / 2, nu)))


def _check(q: np.ndarray, u: np.ndarray, complete_df, confidence_level) -> None:
    problems = []
    if q.size != u.size:
        problems.append(Problem(code="stats.pool_lengths", message="one variance per estimate",
                                expected=f"{q.size} variances", got=str(u.size)))
    if q.size < 2:
        problems.append(Problem(code="stats.pool_too_few", message="pooling needs at least two imputations",
                                expected="m ≥ 2", got=str(q.size)))
    if not (np.all(np.isfinite(q)) and np.all(np.isfinite(u))) or np.any(u < 0):
        problems.append(Problem(code="stats.pool_values", message="estimates and variances must be finite, "
                                "variances non-negative", got=f"estimates {q.tolist()[:3]}…, variances {u.tolist()[:3]}…"))
    if complete_df is not None and not complete_df > 0:
        problems.append(Problem(code="stats.pool_complete_df", message="complete-data df must be positive",
                                got=str(complete_df)))
    if not 0 < confidence_level < 1:
        problems.append(Problem(code="stats.confidence_level", message="confidence level out of range",
                                expected="0 < confidence_level < 1", got=str(confidence_level)))
    if problems:
        raise ModelSpecificationError("cannot pool these analyses", problems)
