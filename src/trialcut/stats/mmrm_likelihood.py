"""(Restricted) likelihood of the repeated-measures model, its derivatives and its maximisation.

Model: y_i = X_i beta + e_i, e_i ~ N(0, Sigma_i(theta)), Sigma_i the rows and columns of the
visit covariance for the visits participant i has.  beta is profiled out (generalised least
squares); theta is found by Fisher scoring with a backtracking line search, finishing with Newton
steps on the observed information once close.  Notation follows Kenward & Roger (1997),
Biometrics 53:983-997: V_r = dV/dtheta_r, P = V^-1 - V^-1 X (X'V^-1 X)^-1 X'V^-1.

  ML:   l = -1/2 [n log 2pi + log|V| + r'V^-1 r]
  REML: l = -1/2 [(n - p) log 2pi + log|V| + log|X'V^-1 X| + r'V^-1 r]
  dl/dtheta_r = -1/2 [tr(V^-1 V_r) - REML * tr((X'V^-1X)^-1 X'V^-1 V_r V^-1 X) - r'V^-1 V_r V^-1 r]
  expected information: 1/2 tr(P V_r P V_s) (REML), 1/2 tr(V^-1 V_r V^-1 V_s) (ML)

Every trace is a sum over missing-visit patterns of small k x k products with the pattern sums of
:mod:`trialcut.stats.mmrm_design`.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from trialcut.errors import ConvergenceError
from trialcut.stats.covariance import CovarianceStructure
from trialcut.stats.mmrm_design import Pattern

LOG_2PI = np.log(2 * np.pi)


@dataclass
class PatternTerms:
    """Per-pattern pieces at one theta, kept for inference (degrees of freedom, KR)."""

    inverse: np.ndarray             # M = Sigma_S^-1
    m_d: np.ndarray                 # M dSigma_S,r  (q_g, s, s)
    m_d_m: np.ndarray               # M dSigma_S,r M
    d2: np.ndarray | None           # d2Sigma_S  (q_g, q_g, s, s)


@dataclass
class Evaluation:
    theta: np.ndarray
    loglik: float
    beta: np.ndarray = None
    xvx_inverse: np.ndarray = None          # Phi = (X'V^-1X)^-1
    gradient: np.ndarray = None
    information: np.ndarray = None          # expected information of theta
    hessian: np.ndarray = None              # observed Hessian of l (order 2)
    q_matrices: np.ndarray = None           # X'V^-1 V_r V^-1 X = -P_r of KR, (q, p, p)
    sigmas: list = None
    terms: list = field(default_factory=list)


class Likelihood:
    def __init__(self, patterns: Sequence[Pattern], structures: Sequence[CovarianceStructure], reml: bool):
        self.patterns = list(patterns)
        self.structures = list(structures)
        self.reml = reml
        sizes = [s.n_parameters for s in structures]
        self.offsets = np.r_[0, np.cumsum(sizes)].astype(int)
        self.n_parameters = int(self.offsets[-1])
        self.n_obs = sum(p.n * len(p.visits) for p in patterns)
        self.n_fixed = patterns[0].x.shape[2]

    def slices(self, theta):
        return [theta[self.offsets[g]:self.offsets[g + 1]] for g in range(len(self.structures))]

    def evaluate(self, theta: np.ndarray, order: int = 1) -> Evaluation:
        """order 0: log-likelihood; 1: + gradient and expected information; 2: + observed Hessian."""
        theta = np.asarray(theta, float)
        parts = [s.derivatives(t, order=order) for s, t in zip(self.structures, self.slices(theta))]
        p = self.n_fixed
        xvx, xvy, yvy, logdet = np.zeros((p, p)), np.zeros(p), 0.0, 0.0
        inverses = []
        for pattern in self.patterns:
            sigma = parts[pattern.group][0][np.ix_(pattern.visits, pattern.visits)]
            factor = np.linalg.cholesky(sigma)
            inverse = _cho_inverse(factor)
            inverses.append(inverse)
            logdet += 2 * pattern.n * np.log(np.diag(factor)).sum()
            xvx += np.tensordot(inverse, pattern.t_xx, axes=([0, 1], [0, 1]))
            xvy += np.tensordot(inverse, pattern.t_xy, axes=([0, 1], [0, 1]))
            yvy += np.sum(inverse * pattern.t_yy)
        xvx_factor = np.linalg.cholesky(xvx)
        phi = _cho_inverse(xvx_factor)
        beta = phi @ xvy
        quadratic = yvy - xvy @ beta
        if self.reml:
            loglik = -0.5 * ((self.n_obs - p) * LOG_2PI + logdet + 2 * np.log(np.diag(xvx_factor)).sum() + quadratic)
        else:
            loglik = -0.5 * (self.n_obs * LOG_2PI + logdet + quadratic)
        result = Evaluation(theta=theta, loglik=float(loglik), beta=beta, xvx_inverse=phi,
                            sigmas=[part[0] for part in parts])
        if order >= 1:
            self._derivatives(result, parts, inverses, order)
        return result

    def _derivatives(self, result: Evaluation, parts, inverses, order: int) -> None:
        q, p = self.n_parameters, self.n_fixed
        beta, phi, reml = result.beta, result.xvx_inverse, self.reml
        gradient = np.zeros(q)
        information = np.zeros((q, q))
        hessian = np.zeros((q, q))
        q_matrices = np.zeros((q, p, p))
        u = np.zeros((q, p))         # X'V^-1 V_r V^-1 r, for the observed Hessian
        for pattern, inverse in zip(self.patterns, inverses):
            g = pattern.group
            block = slice(self.offsets[g], self.offsets[g + 1])
            index = np.ix_(pattern.visits, pattern.visits)
            d_sigma = parts[g][1][(slice(None),) + index]
            m_d = inverse @ d_sigma
            m_d_m = m_d @ inverse
            x_beta = pattern.t_xy @ beta                                    # sum_i x_ij beta y_ik
            residual_cross = (pattern.t_yy - x_beta - x_beta.T
                              + np.einsum("jkab,a,b->jk", pattern.t_xx, beta, beta))   # C_S
            traces = pattern.n * np.einsum("rjj->r", m_d)
            quad = np.einsum("rjk,jk->r", m_d_m, residual_cross)
            # tr(M D_r M D_s) and tr(M D_r M D_s M C)
            pair = np.einsum("rab,sba->rs", m_d, m_d)
            m_c = inverse @ residual_cross
            pair_c = np.einsum("rab,sbc,ca->rs", m_d, m_d, m_c)
            info = pattern.n * pair
            s_len = len(pattern.visits)
            q_block = (m_d_m.reshape(len(m_d_m), -1) @ pattern.t_xx.reshape(s_len * s_len, p * p)).reshape(-1, p, p)
            q_matrices[block] += q_block
            hess = -pattern.n * pair + 2 * pair_c
            if reml:
                spread = np.einsum("ab,jkba->jk", phi, pattern.t_xx)        # G_S = tr(Phi T_xx[j,k])
                traces = traces - np.einsum("rjk,jk->r", m_d_m, spread)
                m_g = inverse @ spread
                pair_g = np.einsum("rab,sbc,ca->rs", m_d, m_d, m_g)
                info = info - pair_g - pair_g.T
                hess = hess + pair_g + pair_g.T
            gradient[block] += -0.5 * (traces - quad)
            information[block, block] += 0.5 * info
            hessian[block, block] += hess
            if order >= 2:
                x_residual = pattern.t_xy - pattern.t_xx @ beta                   # sum_i x_ij r_ik  (s, s, p)
                u[block] += np.einsum("rjk,jka->ra", m_d_m, x_residual)
                d2 = parts[g][2][(slice(None), slice(None)) + index]
                m_c_m = m_c @ inverse
                second = pattern.n * np.einsum("ab,rsba->rs", inverse, d2) - np.einsum("rsab,ba->rs", d2, m_c_m)
                if reml:
                    second -= np.einsum("rsab,ba->rs", d2, m_g @ inverse)
                hessian[block, block] += second
                result.terms.append(PatternTerms(inverse, m_d, m_d_m, d2))
            else:
                result.terms.append(PatternTerms(inverse, m_d, m_d_m, None))
        if reml:
            phi_q = phi @ q_matrices                                       # (q, p, p)
            coupling = np.einsum("rab,sba->rs", phi_q, phi_q)
            information += 0.5 * coupling
            hessian -= coupling
        result.gradient = gradient
        result.information = information
        result.q_matrices = q_matrices
        if order >= 2:
            # l'' = -1/2 [tr(P V_rs) - tr(P V_r P V_s) - y'P V_rs P y + 2 y'P V_r P V_s P y]
            hessian_u = u @ phi @ u.T
            result.hessian = -0.5 * (hessian - 2 * hessian_u)


def _cho_inverse(factor: np.ndarray) -> np.ndarray:
    inverse_factor = np.linalg.inv(factor)
    return inverse_factor.T @ inverse_factor


@dataclass(frozen=True)
class Maximum:
    evaluation: Evaluation
    converged: bool
    iterations: int
    gradient_norm: float
    decrement: float
    message: str


def maximise(likelihood: Likelihood, theta0: np.ndarray, *, max_iterations: int = 100,
             tolerance: float = 1e-8) -> Maximum:
    """Fisher scoring with step halving; Newton steps once the observed information is positive
    definite and the scaled gradient is small.  Converged when g' I^-1 g / 2 < tolerance and the
    observed information at the end is positive definite."""
    theta = np.asarray(theta0, float)
    current = _safe_evaluate(likelihood, theta, 2)
    if current is None:
        raise ConvergenceError("the likelihood cannot be evaluated at the starting values")
    decrement = np.inf
    for iteration in range(1, max_iterations + 1):
        direction, decrement = _direction(current, decrement)
        if decrement / 2 < tolerance:
            return _finish(current, iteration - 1, decrement)
        step, trial = 1.0, None
        for _ in range(40):
            trial = _safe_evaluate(likelihood, current.theta + step * direction, 0)
            if trial is not None and trial.loglik >= current.loglik - 1e-12 * abs(current.loglik):
                break
            step /= 2
            trial = None
        if trial is None:
            if decrement / 2 < 1e3 * tolerance:    # rounding stops progress just short of the tolerance
                return _finish(current, iteration - 1, decrement,
                               f"stopped at the limit of numerical precision: scaled gradient {decrement / 2:.3g} "
                               f"(tolerance {tolerance:g}) with no further increase of the likelihood")
            raise ConvergenceError("the line search found no increase of the likelihood "
                                   f"(iteration {iteration}, scaled gradient {decrement / 2:.3g})")
        current = _safe_evaluate(likelihood, current.theta + step * direction, 2)
        if current is None:
            raise ConvergenceError(f"the likelihood cannot be evaluated after iteration {iteration}")
    direction, decrement = _direction(current, decrement)
    if decrement / 2 < tolerance:
        return _finish(current, max_iterations, decrement)
    raise ConvergenceError(f"no convergence in {max_iterations} iterations "
                           f"(scaled gradient {decrement / 2:.3g}, tolerance {tolerance:g})")


def _direction(evaluation: Evaluation, previous_decrement: float) -> tuple[np.ndarray, float]:
    gradient = evaluation.gradient
    matrix = evaluation.information
    if previous_decrement < 1e-2 and _is_positive_definite(-evaluation.hessian):
        matrix = -evaluation.hessian
    try:
        direction = np.linalg.solve(matrix, gradient)
    except np.linalg.LinAlgError:
        direction = np.linalg.lstsq(matrix, gradient, rcond=None)[0]
    return direction, float(max(gradient @ direction, 0.0))


def _finish(evaluation: Evaluation, iterations: int, decrement: float, message: str = "converged") -> Maximum:
    if not _is_positive_definite(-evaluation.hessian):
        raise ConvergenceError("the gradient vanished but the observed information is not positive "
                               "definite (a saddle point or a flat direction)")
    if any(np.linalg.cond(sigma) > 1e12 for sigma in evaluation.sigmas):
        raise ConvergenceError("the estimated covariance matrix is numerically singular")
    return Maximum(evaluation, True, iterations, float(np.abs(evaluation.gradient).max()), decrement / 2, message)


def _is_positive_definite(matrix: np.ndarray) -> bool:
    if not np.all(np.isfinite(matrix)):
        return False
    try:
        np.linalg.cholesky(0.5 * (matrix + matrix.T))
        return True
    except np.linalg.LinAlgError:
        return False


def _safe_evaluate(likelihood: Likelihood, theta: np.ndarray, order: int) -> Evaluation | None:
    if not np.all(np.isfinite(theta)):
        return None
    try:
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            result = likelihood.evaluate(theta, order)
    except (np.linalg.LinAlgError, FloatingPointError):
        return None
    return result if np.isfinite(result.loglik) else None
