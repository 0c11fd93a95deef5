"""Within-participant covariance structures over the planned visits, behind one protocol.

A structure describes the k x k covariance matrix Sigma(theta) of one participant's outcomes
at the k planned visits.  Every structure is parametrised so that *any* real vector theta
gives a positive definite matrix: the optimiser works on an unconstrained space and cannot
leave the cone of positive definite matrices.

Two families:

* ``unstructured``: log-Cholesky, Sigma = L L', L lower triangular with L_jj = exp(theta) and
  the entries below the diagonal equal to theta (row by row: (1,1), (2,1), (2,2), (3,1), ...).
* every other structure: Sigma = D R D, D = diag(exp(lambda)) holds the standard deviations
  (one log standard deviation shared by all visits, or one per visit for the heterogeneous
  structures) and R(gamma) is a correlation matrix:

  - ``ar1`` / ``heterogeneous_ar1``: R_jk = rho^|j-k|, rho = tanh(gamma).
  - ``compound_symmetry`` / ``heterogeneous_compound_symmetry``: R_jk = rho (j != k),
    rho = a + (1 - a) * logistic(gamma) with a = -1/(k-1), the lower bound for a positive
    definite equicorrelation matrix.
  - ``toeplitz`` / ``heterogeneous_toeplitz``: R_jk = rho_|j-k|; the k-1 lag correlations
    come from k-1 partial autocorrelations phi_d = tanh(gamma_d) by the Durbin-Levinson
    recursion, a one-to-one map onto the positive definite Toeplitz correlation matrices.
  - ``spatial_exponential``: R_jk = exp(-|t_j - t_k| / phi), phi = exp(gamma), on the planned
    times t of the visits; one shared variance.

Each structure gives Sigma, the first derivatives dSigma/dtheta_r and the second derivatives
d2Sigma/dtheta_r dtheta_s analytically.

Note for inference.  None of the optimisation parametrisations above is linear in theta, and the
Kenward-Roger adjusted covariance of the fixed effects (its R_ij term in d2Sigma, and the expected
information of theta) depends on the parametrisation when Sigma is not linear in it.  Estimates,
likelihoods and the Satterthwaite degrees of freedom do not.  So that Kenward-Roger does not depend
on our optimisation choices where it need not, ``unstructured``, ``compound_symmetry`` and
``toeplitz`` also expose ``linear_entries``: the positions (j, k) of Sigma whose values psi are a
linear parametrisation (Sigma = sum_a psi_a G_a).  The engine computes Kenward-Roger in psi, where
d2Sigma = 0 and the second-derivative term vanishes (the usual results: with complete balanced
data the adjustment reproduces the exact tests).  For the other structures Sigma is not linear in
any of the usual parametrisations and Kenward-Roger is computed in the theta documented here, its
second-derivative term included unless the caller leaves it out (``second_derivatives=False``)
or corrects it for the bias of the parameter estimates (``second_derivatives="bias_corrected"``);
both alternatives make the result independent of the parametrisation.
Each structure states its choice in words (``inference_parameters``) for the report.

Adding a structure: write a class with the :class:`CovarianceStructure` members below and add it
to :data:`STRUCTURES` (whose keys must equal ``trialcut.stats.names.COVARIANCE_STRUCTURES``).
"""
from __future__ import annotations

from typing import Callable, Protocol, Sequence

import numpy as np

from trialcut.stats.names import COVARIANCE_STRUCTURES


class CovarianceStructure(Protocol):
    """What the engine needs from a covariance structure over ``n_visits`` visits."""

    name: str
    n_visits: int
    n_parameters: int

    def parameter_names(self, visit_labels: Sequence[str]) -> list[str]: ...

    def start(self, moment_covariance: np.ndarray) -> np.ndarray:
        """Starting theta from a positive definite k x k moment estimate of the covariance."""

    def build(self, theta: np.ndarray) -> np.ndarray:
        """Sigma(theta), k x k."""

    def derivatives(self, theta: np.ndarray, order: int = 1) -> tuple[np.ndarray, ...]:
        """(Sigma, dSigma) with dSigma of shape (q, k, k); with order=2 also d2Sigma (q, q, k, k)."""

    linear_entries: list[tuple[int, int]] | None
    """Entries (j, k) of Sigma that parametrise it linearly (one per parameter), or None."""

    inference_parameters: str
    """In words, the parameters the Kenward-Roger adjustment is computed in: ``linear_entries``
    when there are any, else theta."""

    def identifiability_problem(self, pair_counts: np.ndarray) -> str | None:
        """Why theta cannot be estimated from this missingness (None when it can).

        ``pair_counts[j, k]`` is the number of participants with an outcome at both visits j
        and k (the diagonal: at visit j)."""


# --------------------------------------------------------------------------- unstructured
class Unstructured:
    """Log-Cholesky: Sigma = L L', L_jj = exp(theta), L_jk = theta (j > k), row by row."""

    name = "unstructured"

    def __init__(self, n_visits: int, visit_times: np.ndarray | None = None):
        self.n_visits = n_visits
        self.n_parameters = n_visits * (n_visits + 1) // 2
        self._rows, self._cols = np.tril_indices(n_visits)
        self._diagonal = self._rows == self._cols
        self.linear_entries = list(zip(self._rows, self._cols))     # every variance and covariance
        self.inference_parameters = "the variance at each visit and the covariance of each pair of visits"

    def parameter_names(self, visit_labels):
        return [f"log_cholesky_diagonal[{visit_labels[j]}]" if j == k
                else f"cholesky[{visit_labels[j]},{visit_labels[k]}]"
                for j, k in zip(self._rows, self._cols)]

    def _cholesky_factor(self, theta):
        factor = np.zeros((self.n_visits, self.n_visits))
        factor[self._rows, self._cols] = np.where(self._diagonal, np.exp(theta), theta)
        return factor

    def start(self, moment_covariance):
        factor = np.linalg.cholesky(moment_covariance)
        values = factor[self._rows, self._cols]
        return np.where(self._diagonal, np.log(np.where(self._diagonal, values, 1.0)), values)

    def build(self, theta):
        factor = self._cholesky_factor(np.asarray(theta, float))
        return factor @ factor.T

    def derivatives(self, theta, order=1):
        theta = np.asarray(theta, float)
        factor = self._cholesky_factor(theta)
        q, k = self.n_parameters, self.n_visits
        unit = np.zeros((q, k, k))     # dL/dtheta_r
        unit[np.arange(q), self._rows, self._cols] = np.where(self._diagonal, np.exp(theta), 1.0)
        half = unit @ factor.T
        first = half + half.transpose(0, 2, 1)
        if order < 2:
            return factor @ factor.T, first
        cross = np.einsum("rab,scb->rsac", unit, unit)
        second = cross + cross.transpose(0, 1, 3, 2)
        diagonal = np.flatnonzero(self._diagonal)
        second[diagonal, diagonal] += first[diagonal]
        return factor @ factor.T, first, second

    def identifiability_problem(self, pair_counts):
        rows, cols = np.tril_indices(self.n_visits)
        missing = np.flatnonzero(pair_counts[rows, cols] == 0)
        if missing.size:
            j, k = rows[missing[0]], cols[missing[0]]
            return (f"no participant has outcomes at both visit {k + 1} and visit {j + 1}, "
                    "so their covariance cannot be estimated")
        return None


# --------------------------------------------------------------------------- correlation models
class _Correlation(Protocol):
    n_parameters: int

    def derivatives(self, gamma: np.ndarray, order: int) -> tuple[np.ndarray, ...]: ...
    def start(self, correlation: np.ndarray) -> np.ndarray: ...
    def identifiability_problem(self, pair_counts: np.ndarray) -> str | None: ...


def _lags(n_visits: int) -> np.ndarray:
    index = np.arange(n_visits)
    return np.abs(index[:, None] - index[None, :])


def _needs_some_pair(pair_counts: np.ndarray) -> str | None:
    off_diagonal = pair_counts[~np.eye(len(pair_counts), dtype=bool)]
    if not off_diagonal.size or off_diagonal.max() == 0:
        return "no participant has outcomes at two visits, so no correlation can be estimated"
    return None


class _AutoregressiveCorrelation:
    """R_jk = rho^|j-k|, rho = tanh(gamma)."""

    n_parameters = 1
    words = "the inverse hyperbolic tangent of the correlation between neighbouring visits"

    def __init__(self, n_visits):
        self.lag = _lags(n_visits).astype(float)

    def derivatives(self, gamma, order):
        rho = np.tanh(gamma[0])
        d, slope = self.lag, 1.0 - rho ** 2
        power = rho ** d
        with np.errstate(divide="ignore", invalid="ignore"):
            below = np.where(d >= 1, rho ** np.maximum(d - 1, 0), 0.0)      # rho^(d-1)
            below2 = np.where(d >= 2, rho ** np.maximum(d - 2, 0), 0.0)     # rho^(d-2)
        first = d * below * slope
        out = (power, first[None])
        if order >= 2:
            second = d * slope * ((d - 1) * below2 * slope - 2.0 * rho * below)
            out += (second[None, None],)
        return out

    def start(self, correlation):
        lag_one = np.diagonal(correlation, 1)
        rho = float(np.clip(lag_one.mean() if lag_one.size else 0.0, -0.9, 0.9))
        return np.array([np.arctanh(rho)])

    identifiability_problem = staticmethod(_needs_some_pair)


class _EquicorrelationCorrelation:
    """R_jk = rho (j != k), rho = a + (1 - a) logistic(gamma), a = -1/(k-1)."""

    n_parameters = 1
    words = "the logit of the correlation's position between its lower bound -1/(k-1) and 1"

    def __init__(self, n_visits):
        self.lower = -1.0 / (n_visits - 1) if n_visits > 1 else -1.0
        self.off = ~np.eye(n_visits, dtype=bool)

    def derivatives(self, gamma, order):
        logistic = 1.0 / (1.0 + np.exp(-gamma[0]))
        span = 1.0 - self.lower
        rho = self.lower + span * logistic
        value = np.where(self.off, rho, 1.0)
        first = span * logistic * (1 - logistic) * self.off
        out = (value, first[None])
        if order >= 2:
            out += ((first * (1 - 2 * logistic))[None, None],)
        return out

    def start(self, correlation):
        mean = correlation[self.off].mean() if self.off.any() else 0.0
        rho = float(np.clip(mean, self.lower + 0.05 * (1 - self.lower), 0.9))
        share = (rho - self.lower) / (1 - self.lower)
        return np.array([np.log(share / (1 - share))])

    identifiability_problem = staticmethod(_needs_some_pair)


class _Jet:
    """A value with its gradient and Hessian in m variables (forward-mode second order)."""

    __slots__ = ("value", "gradient", "hessian")

    def __init__(self, value, gradient, hessian):
        self.value, self.gradient, self.hessian = value, gradient, hessian

    def __add__(self, other):
        return _Jet(self.value + other.value, self.gradient + other.gradient, self.hessian + other.hessian)

    def __sub__(self, other):
        return _Jet(self.value - other.value, self.gradient - other.gradient, self.hessian - other.hessian)

    def __mul__(self, other):
        outer = np.outer(self.gradient, other.gradient)
        return _Jet(self.value * other.value,
                    self.gradient * other.value + self.value * other.gradient,
                    self.hessian * other.value + self.value * other.hessian + outer + outer.T)

    @classmethod
    def constant(cls, value, m):
        return cls(float(value), np.zeros(m), np.zeros((m, m)))


class _ToeplitzCorrelation:
    """R_jk = rho_|j-k| from partial autocorrelations phi_d = tanh(gamma_d) (Durbin-Levinson)."""

    words = "the inverse hyperbolic tangents of the partial autocorrelations"

    def __init__(self, n_visits):
        self.n_visits = n_visits
        self.n_parameters = n_visits - 1
        self.lag = _lags(n_visits)

    def _lag_correlations(self, gamma):
        m = self.n_parameters
        partial = []
        for d in range(m):
            phi = np.tanh(gamma[d])
            gradient, hessian = np.zeros(m), np.zeros((m, m))
            gradient[d] = 1 - phi ** 2
            hessian[d, d] = -2 * phi * (1 - phi ** 2)
            partial.append(_Jet(phi, gradient, hessian))
        one = _Jet.constant(1.0, m)
        rho, coefficients = [], []
        for step, phi in enumerate(partial):
            if step == 0:
                rho.append(phi)
                coefficients = [phi]
                continue
            predicted, explained = _Jet.constant(0.0, m), _Jet.constant(0.0, m)
            for i, a in enumerate(coefficients):           # a_{i+1} of order `step`
                predicted = predicted + a * rho[step - 1 - i]
                explained = explained + a * rho[i]
            rho.append(predicted + phi * (one - explained))
            coefficients = [a - phi * coefficients[step - 1 - i] for i, a in enumerate(coefficients)] + [phi]
        return rho

    def derivatives(self, gamma, order):
        m = self.n_parameters
        rho = self._lag_correlations(np.asarray(gamma, float))
        values = np.array([1.0] + [r.value for r in rho])
        gradients = np.vstack([np.zeros(m)] + [r.gradient for r in rho]) if m else np.zeros((1, 0))
        value = values[self.lag]
        first = np.moveaxis(gradients[self.lag], -1, 0)                    # (m, k, k)
        out = (value, first)
        if order >= 2:
            hessians = np.stack([np.zeros((m, m))] + [r.hessian for r in rho])
            out += (np.moveaxis(hessians[self.lag], (-2, -1), (0, 1)),)    # (m, m, k, k)
        return out

    def start(self, correlation):
        k = self.n_visits
        lag_means = np.array([np.diagonal(correlation, d).mean() for d in range(1, k)])
        for shrink in (1.0, 0.8, 0.6, 0.4, 0.2, 0.0):
            rho = np.concatenate([[1.0], shrink * lag_means])
            if np.linalg.eigvalsh(rho[self.lag]).min() > 1e-3:
                break
        partial = _partial_autocorrelations(rho[1:])
        return np.arctanh(np.clip(partial, -0.95, 0.95))

    def identifiability_problem(self, pair_counts):
        for d in range(1, self.n_visits):
            if np.diagonal(pair_counts, d).max() == 0:
                return f"no participant has outcomes at two visits {d} apart, so that lag's correlation cannot be estimated"
        return None


def _partial_autocorrelations(rho: np.ndarray) -> np.ndarray:
    """Durbin-Levinson, from lag correlations rho_1..rho_m to partial autocorrelations."""
    partial, coefficients = [], np.zeros(0)
    for m in range(1, len(rho) + 1):
        previous = rho[:m - 1]
        numerator = rho[m - 1] - coefficients @ previous[::-1] if m > 1 else rho[0]
        denominator = 1 - coefficients @ previous if m > 1 else 1.0
        phi = numerator / denominator
        coefficients = np.concatenate([coefficients - phi * coefficients[::-1], [phi]])
        partial.append(phi)
    return np.array(partial)


class _ExponentialCorrelation:
    """R_jk = exp(-|t_j - t_k| / phi), phi = exp(gamma)."""

    n_parameters = 1
    words = "the log of the range (the time over which the correlation falls to 1/e)"

    def __init__(self, visit_times):
        times = np.asarray(visit_times, float)
        self.distance = np.abs(times[:, None] - times[None, :])
        gaps = np.diff(np.sort(times))
        self.typical_gap = float(gaps.mean()) if gaps.size else 1.0

    def derivatives(self, gamma, order):
        scaled = self.distance / np.exp(gamma[0])          # |dt| / phi
        value = np.exp(-scaled)
        out = (value, (value * scaled)[None])
        if order >= 2:
            out += ((value * (scaled ** 2 - scaled))[None, None],)
        return out

    def start(self, correlation):
        lag_one = np.diagonal(correlation, 1)
        rho = float(np.clip(lag_one.mean() if lag_one.size else 0.5, 0.05, 0.95))
        return np.array([np.log(-self.typical_gap / np.log(rho))])

    identifiability_problem = staticmethod(_needs_some_pair)


# --------------------------------------------------------------------------- Sigma = D R D
class ScaledCorrelation:
    """Sigma = D R(gamma) D, D = diag(exp(lambda)); theta = (lambda, gamma).

    ``heterogeneous``: one log standard deviation per visit, else one for all visits."""

    def __init__(self, name: str, correlation: _Correlation, n_visits: int, heterogeneous: bool):
        self.name = name
        self.n_visits = n_visits
        self.correlation = correlation
        self.heterogeneous = heterogeneous
        # loading[j, a]: how log standard deviation parameter a enters visit j
        self.loading = np.eye(n_visits) if heterogeneous else np.ones((n_visits, 1))
        self.n_scale = self.loading.shape[1]
        self.n_parameters = self.n_scale + correlation.n_parameters
        # Homogeneous equicorrelation and Toeplitz are linear in (variance, lag covariances).
        linear = not heterogeneous and isinstance(correlation, (_EquicorrelationCorrelation, _ToeplitzCorrelation))
        self.linear_entries = [(0, d) for d in range(self.n_parameters)] if linear else None
        if linear:
            self.inference_parameters = ("the variance and the covariance of two visits"
                                         if isinstance(correlation, _EquicorrelationCorrelation)
                                         else "the variance and the covariance at each lag")
        else:
            scale = "one log standard deviation per visit" if heterogeneous else "the log standard deviation"
            self.inference_parameters = f"{scale} and {correlation.words}"

    def parameter_names(self, visit_labels):
        scale = ([f"log_sd[{label}]" for label in visit_labels] if self.heterogeneous else ["log_sd"])
        return scale + [f"correlation_{i + 1}" for i in range(self.correlation.n_parameters)]

    def start(self, moment_covariance):
        sd = np.sqrt(np.diag(moment_covariance))
        scale = np.log(sd) if self.heterogeneous else np.array([np.log(np.sqrt(np.mean(sd ** 2)))])
        return np.concatenate([scale, self.correlation.start(moment_covariance / np.outer(sd, sd))])

    def build(self, theta):
        return self.derivatives(theta, order=0)[0]

    def derivatives(self, theta, order=1):
        theta = np.asarray(theta, float)
        scale_theta, gamma = theta[:self.n_scale], theta[self.n_scale:]
        sd = np.exp(self.loading @ scale_theta)
        sd_outer = np.outer(sd, sd)
        parts = self.correlation.derivatives(gamma, max(order, 0))
        sigma = sd_outer * parts[0]
        if order < 1:
            return (sigma,)
        # A_ja + A_ka: how Sigma_jk scales with log standard deviation a
        pair_loading = np.moveaxis(self.loading[:, None, :] + self.loading[None, :, :], -1, 0)
        first = np.concatenate([pair_loading * sigma, sd_outer * parts[1]])
        if order < 2:
            return sigma, first
        q, s = self.n_parameters, self.n_scale
        second = np.zeros((q, q) + sigma.shape)
        second[:s, :s] = pair_loading[:, None] * pair_loading[None, :] * sigma
        mixed = pair_loading[:, None] * (sd_outer * parts[1])[None, :]
        second[:s, s:] = mixed
        second[s:, :s] = mixed.transpose(1, 0, 2, 3)
        second[s:, s:] = sd_outer * parts[2]
        return sigma, first, second

    def identifiability_problem(self, pair_counts):
        if self.heterogeneous:
            unseen = np.flatnonzero(np.diag(pair_counts) == 0)
            if unseen.size:
                return f"no outcome at visit {unseen[0] + 1}, so its variance cannot be estimated"
        return self.correlation.identifiability_problem(pair_counts)


# --------------------------------------------------------------------------- registry
StructureFactory = Callable[[int, np.ndarray], CovarianceStructure]


def _scaled(name: str, correlation: Callable[[int, np.ndarray], _Correlation], heterogeneous: bool) -> StructureFactory:
    def factory(n_visits: int, visit_times: np.ndarray) -> CovarianceStructure:
        return ScaledCorrelation(name, correlation(n_visits, visit_times), n_visits, heterogeneous)
    return factory


STRUCTURES: dict[str, StructureFactory] = {
    "unstructured": lambda n_visits, visit_times: Unstructured(n_visits),
    "toeplitz": _scaled("toeplitz", lambda k, t: _ToeplitzCorrelation(k), False),
    "heterogeneous_toeplitz": _scaled("heterogeneous_toeplitz", lambda k, t: _ToeplitzCorrelation(k), True),
    "ar1": _scaled("ar1", lambda k, t: _AutoregressiveCorrelation(k), False),
    "heterogeneous_ar1": _scaled("heterogeneous_ar1", lambda k, t: _AutoregressiveCorrelation(k), True),
    "compound_symmetry": _scaled("compound_symmetry", lambda k, t: _EquicorrelationCorrelation(k), False),
    "heterogeneous_compound_symmetry": _scaled(
        "heterogeneous_compound_symmetry", lambda k, t: _EquicorrelationCorrelation(k), True),
    "spatial_exponential": _scaled("spatial_exponential", lambda k, t: _ExponentialCorrelation(t), False),
}
assert tuple(STRUCTURES) == COVARIANCE_STRUCTURES, "registry and names.COVARIANCE_STRUCTURES differ"


def make_structure(name: str, n_visits: int, visit_times: Sequence[float] | None = None) -> CovarianceStructure:
    """The structure ``name`` over ``n_visits`` visits (planned times default to 1..k)."""
    times = np.arange(1.0, n_visits + 1) if visit_times is None else np.asarray(visit_times, float)
    return STRUCTURES[name](n_visits, times)
