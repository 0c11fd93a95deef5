"""Group-sequential boundaries by alpha spending, for interim looks at a trial's data.

Sources, cited once here:
- Lan, K.K.G. & DeMets, D.L. (1983). Discrete sequential boundaries for clinical trials.
  Biometrika 70:659–663.  The spending function α(t): the type I error spent by information
  fraction t; at look k the boundary c_k solves
  P(|Z_j| < c_j for j < k, |Z_k| ≥ c_k) = α(t_k) − α(t_{k−1}) under the null hypothesis.
  Their O'Brien–Fleming-type α(t) = 2 − 2Φ(z_{1−α/2} / √t) and Pocock-type
  α(t) = α·ln(1 + (e − 1)·t) (written here for a two-sided test at total level α).
- Hwang, I.K., Shih, W.J. & DeCani, J.S. (1990). Group sequential designs using a family of
  type I error probability spending functions. Statistics in Medicine 9:1439–1445:
  α(t) = α(1 − e^{−γt}) / (1 − e^{−γ}) for γ ≠ 0 and α·t for γ = 0.
- Jennison, C. & Turnbull, B.W. (2000). Group Sequential Methods with Applications to
  Clinical Trials. Chapman & Hall/CRC.  The canonical joint distribution (Z_1, …, Z_K)
  multivariate normal with Cov(Z_i, Z_j) = √(t_i / t_j) for i ≤ j, and the recursive
  numerical integration of their chapter 19 (here on an even grid with Simpson's rule).

Two routes compute the same crossing probabilities: the recursive integration (the main
route) and scipy's multivariate normal distribution function (a second route, used by the
tests).  Tests are two-sided and symmetric: a look rejects when |Z_k| ≥ c_k.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Callable, Sequence

import numpy as np
import pandas as pd
from scipy import optimize, stats

from trialcut.errors import ModelSpecificationError

# --------------------------------------------------------------------------- spending functions


def _obrien_fleming_type(t: np.ndarray, alpha: float, parameter: float | None) -> np.ndarray:
    z = stats.norm.isf(alpha / 2)
    with np.errstate(divide="ignore"):
        return np.where(t > 0, 2 * stats.norm.sf(z / np.sqrt(np.maximum(t, 1e-300))), 0.0)


def _pocock_type(t: np.ndarray, alpha: float, parameter: float | None) -> np.ndarray:
    return alpha * np.log1p((np.e - 1) * t)


def _hwang_shih_decani(t: np.ndarray, alpha: float, parameter: float | None) -> np.ndarray:
    gamma = 0.0 if parameter is None else float(parameter)
    if abs(gamma) < 1e-12:
        return alpha * t
    return alpha * -np.expm1(-gamma * t) / -np.expm1(-gamma)


# Spending functions by plan name: (t, alpha, parameter) -> alpha spent by fraction t.
SPENDING_FUNCTIONS: dict[str, Callable[[np.ndarray, float, float | None], np.ndarray]] = {
    "obrien_fleming_type": _obrien_fleming_type,
    "pocock_type": _pocock_type,
    "hwang_shih_decani": _hwang_shih_decani,
}


def alpha_spent(fractions: Sequence[float], *, alpha: float, spending: str,
                parameter: float | None = None) -> np.ndarray:
    """Cumulative alpha spent at each information fraction (fractions above 1 count as 1)."""
    if spending not in SPENDING_FUNCTIONS:
        raise ModelSpecificationError(f"unknown spending function {spending!r}; expected one of "
                                      + ", ".join(SPENDING_FUNCTIONS))
    t = np.minimum(np.asarray(fractions, dtype=float), 1.0)
    return np.asarray(SPENDING_FUNCTIONS[spending](t, alpha, parameter), dtype=float)


# --------------------------------------------------------------------------- crossing probabilities
_Z_LIMIT = 12.0          # beyond ±12 the normal density is below 1e-31: nothing is lost
_GRID_STEP = 0.01


class _Integrator:
    """Recursive integration (Jennison & Turnbull 2000, ch. 19): carries the sub-density of
    Z_k on the continuation region (−c_k, c_k) from look to look."""

    def __init__(self, fractions: np.ndarray):
        self.fractions = fractions
        self.grid: np.ndarray | None = None
        self.density: np.ndarray | None = None

    def crossing(self, k: int, c: float) -> float:
        """P(no crossing before look k, |Z_k| ≥ c) given the boundaries fixed so far."""
        if k == 0:
            return float(2 * stats.norm.sf(c))
        ratio, spread = self._step(k)
        weights = self.density * _simpson_weights(self.grid)
        outside = stats.norm.sf((c - self.grid * ratio) / spread) + stats.norm.cdf((-c - self.grid * ratio) / spread)
        return float(weights @ outside)

    def fix(self, k: int, c: float) -> None:
        """Move on past look k with boundary c."""
        upper = min(c, _Z_LIMIT)
        ratio, spread = self._step(k) if k > 0 else (0.0, 1.0)
        step = _GRID_STEP if k == 0 else min(_GRID_STEP, spread / 10)
        points = max(int(np.ceil(2 * upper / step)), 2)
        grid = np.linspace(-upper, upper, points + (points % 2 == 1) + 1)   # odd count for Simpson
        if k == 0:
            density = stats.norm.pdf(grid)
        else:
            weights = self.density * _simpson_weights(self.grid)
            kernel = stats.norm.pdf((grid[:, None] - self.grid[None, :] * ratio) / spread) / spread
            density = kernel @ weights
        self.grid, self.density = grid, density

    def _step(self, k: int) -> tuple[float, float]:
        before, now = self.fractions[k - 1], self.fractions[k]
        return float(np.sqrt(before / now)), float(np.sqrt(1 - before / now))


def _simpson_weights(grid: np.ndarray) -> np.ndarray:
    h = grid[1] - grid[0]
    weights = np.ones(len(grid))
    weights[1:-1:2] = 4
    weights[2:-1:2] = 2
    return weights * h / 3


def _correlation(fractions: np.ndarray) -> np.ndarray:
    t = np.asarray(fractions, dtype=float)
    return np.sqrt(np.minimum.outer(t, t) / np.maximum.outer(t, t))


def continuation_probability(fractions: Sequence[float], bounds: Sequence[float]) -> float:
    """P(|Z_j| < c_j for every look j) from scipy's multivariate normal (the second route)."""
    t = np.asarray(fractions, dtype=float)
    c = np.minimum(np.asarray(bounds, dtype=float), _Z_LIMIT)
    if len(t) == 1:
        return float(1 - 2 * stats.norm.sf(c[0]))
    # The distribution function is a randomised quasi-Monte Carlo integral: a fixed seed keeps it repeatable.
    distribution = stats.multivariate_normal(mean=np.zeros(len(t)), cov=_correlation(t), seed=20240101,
                                             abseps=1e-9, releps=1e-9, maxpts=200_000 * len(t))
    return float(distribution.cdf(c, lower_limit=-c))


class _MultivariateNormalRoute:
    def __init__(self, fractions: np.ndarray):
        self.fractions = fractions
        self.bounds: list[float] = []

    def crossing(self, k: int, c: float) -> float:
        before = continuation_probability(self.fractions[:k], self.bounds) if k else 1.0
        return before - continuation_probability(self.fractions[:k + 1], self.bounds + [c])

    def fix(self, k: int, c: float) -> None:
        self.bounds.append(c)


_ROUTES = {"integration": _Integrator, "multivariate_normal": _MultivariateNormalRoute}


# --------------------------------------------------------------------------- boundaries
@dataclass(frozen=True)
class Boundaries:
    """Two-sided boundaries at each look: reject when |Z_k| ≥ z[k], i.e. nominal p ≤ nominal_p[k]."""

    fractions: tuple[float, ...]
    cumulative_alpha: tuple[float, ...]
    z: tuple[float, ...]
    nominal_p: tuple[float, ...]
    alpha: float
    spending: str
    parameter: float | None

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame({"look": range(1, len(self.z) + 1), "information_fraction": self.fractions,
                             "cumulative_alpha": self.cumulative_alpha, "boundary_z": self.z,
                             "boundary_p": self.nominal_p})

    def to_dict(self) -> dict:
        return {"fractions": list(self.fractions), "cumulative_alpha": list(self.cumulative_alpha),
                "z": [None if np.isinf(v) else v for v in self.z], "nominal_p": list(self.nominal_p),
                "alpha": self.alpha, "spending": self.spending, "parameter": self.parameter}


def check_fractions(fractions: Sequence[float]) -> np.ndarray:
    t = np.asarray(fractions, dtype=float)
    if t.ndim != 1 or len(t) == 0:
        raise ModelSpecificationError("group-sequential boundaries need at least one information fraction")
    if np.any(~np.isfinite(t)) or np.any(t <= 0) or np.any(t > 1):
        raise ModelSpecificationError(f"information fractions must lie in (0, 1]; got {list(map(float, t))}")
    if np.any(np.diff(t) <= 0):
        raise ModelSpecificationError(f"information fractions must increase from look to look; got {list(map(float, t))}")
    return t


def boundaries(fractions: Sequence[float], *, alpha: float, spending: str, parameter: float | None = None,
               route: str = "integration") -> Boundaries:
    """Lan–DeMets boundaries at the given (actual) information fractions for a two-sided level ``alpha``."""
    t = check_fractions(fractions)
    # A pure function of its settings with a frozen result: the graph test asks for the same local
    # levels many times per look, and a simulation for the same looks in every trial.
    return _boundaries(tuple(map(float, t)), alpha, spending, parameter, route)


@lru_cache(maxsize=512, typed=True)
def _boundaries(fractions: tuple[float, ...], alpha: float, spending: str, parameter: float | None,
                route: str) -> Boundaries:
    t = np.array(fractions, dtype=float)
    cumulative = alpha_spent(t, alpha=alpha, spending=spending, parameter=parameter)
    increments = np.diff(np.concatenate([[0.0], cumulative]))
    return _solve(t, increments, route, cumulative=cumulative, alpha=alpha, spending=spending, parameter=parameter)


def _solve(t: np.ndarray, increments: np.ndarray, route: str, **facts) -> Boundaries:
    engine = _ROUTES[route](t)
    z: list[float] = []
    for k, target in enumerate(increments):
        c = _boundary_for(engine, k, float(target))
        engine.fix(k, c)
        z.append(c)
    return Boundaries(fractions=tuple(map(float, t)), cumulative_alpha=tuple(map(float, facts["cumulative"])),
                      z=tuple(z), nominal_p=tuple(float(2 * stats.norm.sf(c)) for c in z),
                      alpha=facts["alpha"], spending=facts["spending"], parameter=facts["parameter"])


def _boundary_for(engine, k: int, target: float) -> float:
    """The c with P(first crossing at look k) = target; no alpha to spend means no boundary."""
    if target <= 1e-15:
        return float("inf")
    low, high = 0.0, _Z_LIMIT
    if engine.crossing(k, low) <= target:
        return low   # more alpha left than the continuation region holds: reject on any value
    return float(optimize.brentq(lambda c: engine.crossing(k, c) - target, low, high, xtol=1e-10))


def constant_boundaries(looks: int, *, alpha: float, shape: str, route: str = "integration") -> tuple[float, ...]:
    """The classical boundaries for ``looks`` equally spaced looks (Jennison & Turnbull 2000, ch. 2):
    Pocock's constant c_k = C_P and O'Brien & Fleming's c_k = C_B·√(K/k), with C chosen so the
    total crossing probability is ``alpha``.  Used to check the integration against published tables."""
    t = np.arange(1, looks + 1) / looks
    scale = {"pocock": np.ones(looks), "obrien_fleming": np.sqrt(looks / np.arange(1, looks + 1))}[shape]

    def total_crossing(constant: float) -> float:
        engine = _ROUTES[route](t)
        spent = 0.0
        for k in range(looks):
            spent += engine.crossing(k, constant * scale[k])
            engine.fix(k, constant * scale[k])
        return spent - alpha

    constant = optimize.brentq(total_crossing, 1.0, 6.0, xtol=1e-10)
    return tuple(float(constant * s) for s in scale)


# --------------------------------------------------------------------------- several hypotheses
@dataclass(frozen=True)
class SequentialDecision:
    """Outcome of one look for a family of hypotheses (graphical procedure with group-sequential
    local tests, Maurer & Bretz 2013, Statistics in Biopharmaceutical Research 5:311–320)."""

    local_alpha: tuple[float, ...]
    boundary_z: tuple[float, ...]
    boundary_p: tuple[float, ...]
    crossed_alone: tuple[bool, ...]
    rejected: tuple[bool, ...]

    def to_dict(self) -> dict:
        return {"local_alpha": list(self.local_alpha),
                "boundary_z": [None if np.isinf(v) else v for v in self.boundary_z],
                "boundary_p": list(self.boundary_p), "crossed_alone": list(self.crossed_alone),
                "rejected": list(self.rejected)}


def sequential_graph_test(p_values: Sequence[float | None], *, weights: Sequence[float],
                          transitions: Sequence[Sequence[float]], alpha: float,
                          nominal_level: Callable[[int, float], float]) -> SequentialDecision:
    """Reject hypotheses at the current look one at a time: H_i goes when p_i ≤ its nominal level
    for local alpha w_i·α (``nominal_level(i, local_alpha)``, from that hypothesis' own
    boundaries); its weight then passes along the graph (Bretz et al. 2009, Algorithm 1) and
    the others' levels are recomputed.  A hypothesis without a p-value is never rejected."""
    from trialcut.stats.multiplicity import remove_node

    p = np.array([np.nan if v is None else float(v) for v in p_values])
    w, g = np.asarray(weights, float).copy(), np.asarray(transitions, float).copy()
    crossed_alone = tuple(bool(p[i] <= nominal_level(i, w[i] * alpha)) for i in range(len(p)))
    remaining, rejected = list(range(len(p))), [False] * len(p)
    held = [float(w[i] * alpha) for i in range(len(p))]
    while remaining:
        found = [i for i in remaining if not np.isnan(p[i]) and p[i] <= nominal_level(i, w[i] * alpha)]
        if not found:
            break
        j = found[0]
        rejected[j], held[j] = True, float(w[j] * alpha)
        remaining.remove(j)
        w, g = remove_node(w, g, j, remaining)
    for i in remaining:
        held[i] = float(w[i] * alpha)
    levels = [nominal_level(i, a) for i, a in enumerate(held)]
    return SequentialDecision(local_alpha=tuple(held),
                              boundary_z=tuple(float(stats.norm.isf(v / 2)) if v > 0 else float("inf")
                                               for v in levels),
                              boundary_p=tuple(map(float, levels)), crossed_alone=crossed_alone,
                              rejected=tuple(rejected))
