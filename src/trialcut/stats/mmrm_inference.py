"""Variance of the fixed effects and degrees of freedom for their contrasts.

Kenward, M. G. & Roger, J. H. (1997). Small sample inference for fixed effects from restricted
maximum likelihood. Biometrics 53:983-997.  Symbols follow the paper: Phi = (X'V^-1 X)^-1,
P_i = -X'V^-1 V_i V^-1 X, Q_ij = X'V^-1 V_i V^-1 V_j V^-1 X, R_ij = X'V^-1 V_ij V^-1 X,
W = the inverse of the *expected* information of theta (REML: 1/2 tr(P V_i P V_j); ML:
1/2 tr(V^-1 V_i V^-1 V_j)), evaluated at the estimate.

Degrees-of-freedom methods (``df=``):

The derivatives dSigma/dtheta and W are taken in the parametrisation described in
:mod:`trialcut.stats.covariance`: for structures linear in their variances and covariances
(unstructured, compound symmetry, Toeplitz) in those entries psi (W_psi = J W_theta J',
J = dpsi/dtheta, and d2Sigma/dpsi2 = 0), otherwise in the optimisation parameters theta.

* ``kenward_roger``: variance Phi_A = Phi + 2 Phi {sum_ij W_ij (Q_ij - P_i Phi P_j - R_ij / 4)} Phi;
  a contrast L of rank l is tested with the scaled F, lambda * F ~ F(l, m), with lambda and m from
  the paper's moment matching (for l = 1 this is a t test on Phi_A with m = 2 (L Phi_A L')^2 / g'Wg).
  ``second_derivatives=False`` leaves out the R_ij term.  R_ij is zero for the structures that are
  linear in psi, so the switch changes nothing there; for the others it is taken in theta.  Without
  R_ij the adjustment uses only first derivatives and W, which change together under any smooth
  one-to-one reparametrisation, so its standard errors and df do not depend on the parametrisation;
  with R_ij they do.
  ``second_derivatives="bias_corrected"`` adds the term the 1997 expansion leaves out, following
  Kenward, M. G. & Roger, J. H. (2009), An improved approximation to the precision of fixed effects
  from restricted maximum likelihood, Computational Statistics & Data Analysis 53:2583-2595: the
  bias b of the REML estimate of theta, E[Phi(theta_hat)] ~ Phi + sum_i b_i dPhi/dtheta_i +
  1/2 sum_ij W_ij d2Phi/dtheta_i dtheta_j.  b is the first-order bias of Cox & Snell (1968, JRSS B
  30:248-275); for the Gaussian error contrasts of REML its third-derivative terms cancel and
  b = -1/2 W h, h_r = 1/2 tr(P D P V_r), D = sum_ij W_ij V_ij (our derivation; checked against
  dense matrices and a textbook case in tests/stats/test_mmrm_kenward_roger.py).  Since
  dPhi/dtheta_i = -Phi P_i Phi with KR's P_i, the correction replaces D in R by
  D - sum_k c_k V_k, c = W h: D less its projection on the first derivatives in the metric
  1/2 tr(P A P B).  What remains of d2Sigma cannot be produced by any change of parameters, so
  the adjustment is the same in every parametrisation
  (tests/external/test_mmrm_kenward_roger_parametrisation.py); for linear structures it equals the
  1997 adjustment.
* ``satterthwaite``: variance Phi; one-df df = 2 (L Phi L')^2 / (g' W g), g_i = L dPhi/dtheta_i L';
  for l > 1 the contrast is rotated to the eigenvectors of L Phi L', each row gets its one-df value
  nu_m and the denominator df is 2E/(E - l) with E = sum_m nu_m / (nu_m - 2) (rows with nu_m <= 2
  are left out of E).
* ``participant_split``: the residual df split into a participant-level part (participants minus
  the number of columns with one value per participant, intercept included) and a visit-level
  part (observations minus participants minus the remaining columns); each column has the df of
  its part and a contrast gets the smallest df among the columns it touches.
* ``residual``: observations minus the number of fixed effects, for every contrast.

With ``robust=True`` the variance is the empirical sandwich Phi (sum_i X_i'V_i^-1 r_i r_i'V_i^-1 X_i) Phi
and the degrees of freedom are those the model-based analysis would give (no Kenward-Roger scaling
of the F statistic); the fit's warnings say so.
"""
from __future__ import annotations

import numpy as np
from scipy import stats
from scipy.linalg import block_diag

from trialcut.stats.mmrm_design import Design
from trialcut.stats.mmrm_likelihood import Evaluation, Likelihood


class Inference:
    def __init__(self, likelihood: Likelihood, evaluation: Evaluation, design: Design, df_method: str,
                 robust: bool, second_derivatives: bool = True, bias_correction: bool = False):
        self.df_method = df_method
        self.robust = robust
        self.second_derivatives = bool(second_derivatives)
        self.bias_correction = bool(bias_correction)
        self.beta = evaluation.beta
        self.phi = evaluation.xvx_inverse
        self.weights_theta = np.linalg.inv(evaluation.information)            # W in theta
        jacobians = _jacobians(likelihood, evaluation.theta)                  # dpsi/dtheta per group
        self.to_psi = [np.linalg.inv(j) for j in jacobians]                   # dtheta/dpsi per group
        self.linear = [s.linear_entries is not None for s in likelihood.structures]
        jacobian = block_diag(*jacobians)
        self.weights = jacobian @ self.weights_theta @ jacobian.T
        self.q_matrices = np.einsum("rab,rs->sab", evaluation.q_matrices, block_diag(*self.to_psi))
        self.psi = self.phi @ self.q_matrices @ self.phi                      # Phi P_i Phi up to sign
        self.notes: list[str] = []
        self.model_based = self.phi          # Phi, or Phi_A for Kenward-Roger
        if df_method == "kenward_roger":
            self.model_based = self.phi + 2 * self._kenward_roger_lambda(
                likelihood, evaluation, include_second=self.second_derivatives)
        self.covariance = _sandwich(likelihood, evaluation) if robust else self.model_based
        n_participant_level = int(design.participant_level.sum())
        p = len(self.beta)
        self.participant_level = design.participant_level
        self.df_participant_level = design.n_subjects - n_participant_level
        self.df_visit_level = design.n_obs - design.n_subjects - (p - n_participant_level)
        self.df_residual = design.n_obs - p
        if df_method == "participant_split" and min(self.df_participant_level, self.df_visit_level) <= 0:
            self.notes.append(f"participant-split degrees of freedom are not positive (participant level "
                              f"{self.df_participant_level}, visit level {self.df_visit_level}): too few participants "
                              "or outcomes for this method")
        if robust and df_method != "residual":
            self.notes.append(f"robust variance: standard errors are the empirical sandwich; degrees of freedom "
                              f"({df_method}) are those of the model-based analysis")

    # ----------------------------------------------------------------- Kenward-Roger
    def _kenward_roger_lambda(self, likelihood: Likelihood, evaluation: Evaluation, include_second: bool):
        p = len(self.beta)
        total = np.zeros((p, p))
        second = (self._second_derivative_sums(likelihood, evaluation)
                  if include_second and not any(self.linear) else None)
        for pattern, terms in zip(likelihood.patterns, evaluation.terms):
            block = slice(likelihood.offsets[pattern.group], likelihood.offsets[pattern.group + 1])
            w = self.weights[block, block]
            m_d = np.einsum("rjk,ra->ajk", terms.m_d, self.to_psi[pattern.group])
            inner = np.einsum("ij,iab,jbc->ac", w, m_d, m_d) @ terms.inverse     # sum W_ij M D_i M D_j M
            if second is not None:
                index = np.ix_(pattern.visits, pattern.visits)
                inner -= 0.25 * terms.inverse @ second[pattern.group][index] @ terms.inverse
            total += np.tensordot(inner, pattern.t_xx, axes=([0, 1], [0, 1]))
        q_mats = self.q_matrices
        total -= np.einsum("ij,iab,bc,jcd->ad", self.weights, q_mats, self.phi, q_mats, optimize=True)
        lam = self.phi @ total @ self.phi
        return 0.5 * (lam + lam.T)

    def _second_derivative_sums(self, likelihood: Likelihood, evaluation: Evaluation) -> list[np.ndarray]:
        """Per covariance group, sum_ij W_ij d2Sigma/dtheta_i dtheta_j (k x k); with the bias
        correction, less its projection on the first derivatives (see the module docstring)."""
        parts = [s.derivatives(t, order=2) for s, t in zip(likelihood.structures, likelihood.slices(evaluation.theta))]
        offsets = likelihood.offsets
        sums = [np.einsum("ij,ijab->ab", self.weights[offsets[g]:offsets[g + 1], offsets[g]:offsets[g + 1]], part[2])
                for g, part in enumerate(parts)]
        if not self.bias_correction:
            return sums
        coefficients = self.weights @ self._metric_with_first_derivatives(likelihood, evaluation, sums)
        return [total - np.einsum("r,rab->ab", coefficients[offsets[g]:offsets[g + 1]], part[1])
                for g, (total, part) in enumerate(zip(sums, parts))]

    def _metric_with_first_derivatives(self, likelihood: Likelihood, evaluation: Evaluation, sums) -> np.ndarray:
        """h_r = 1/2 tr(P D P V_r), D the block-diagonal matrix of the groups' ``sums``, from the
        pattern sums as the information is: tr(PAPB) = sum_S [n tr(MAMB) - 2 tr(MAMBMG_S)] + tr(Phi Q_A Phi Q_B)
        with G_S = sum_i X_i Phi X_i' over the pattern's participants and Q_A = X'V^-1 A V^-1 X."""
        p = len(self.beta)
        h = np.zeros(likelihood.n_parameters)
        q_a = np.zeros((p, p))
        for pattern, terms in zip(likelihood.patterns, evaluation.terms):
            block = slice(likelihood.offsets[pattern.group], likelihood.offsets[pattern.group + 1])
            m_a = terms.inverse @ sums[pattern.group][np.ix_(pattern.visits, pattern.visits)]
            m_g = terms.inverse @ np.einsum("ab,jkba->jk", self.phi, pattern.t_xx)
            h[block] += 0.5 * (pattern.n * np.einsum("ab,rba->r", m_a, terms.m_d)
                               - 2 * np.einsum("ab,rbc,ca->r", m_a, terms.m_d, m_g))
            q_a += np.tensordot(m_a @ terms.inverse, pattern.t_xx, axes=([0, 1], [0, 1]))
        h += 0.5 * np.einsum("ab,rba->r", self.phi @ q_a, self.phi @ evaluation.q_matrices)
        return h

    # ----------------------------------------------------------------- one-df contrasts
    def contrasts(self, contrast: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Estimate, standard error and df of each row of ``contrast``."""
        contrast = np.atleast_2d(contrast)
        estimate = contrast @ self.beta
        variance = np.einsum("mp,pq,mq->m", contrast, self.covariance, contrast)
        return estimate, np.sqrt(np.maximum(variance, 0.0)), self.one_df(contrast)

    def one_df(self, contrast: np.ndarray) -> np.ndarray:
        if self.df_method in ("kenward_roger", "satterthwaite"):
            centre = self.model_based if self.df_method != "satterthwaite" else self.phi
            variance = np.einsum("mp,pq,mq->m", contrast, centre, contrast)
            gradient = np.einsum("mp,ipq,mq->mi", contrast, self.psi, contrast)
            spread = np.einsum("mi,ij,mj->m", gradient, self.weights, gradient)
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.where(spread > 1e-14 * variance ** 2, 2 * variance ** 2 / spread, np.inf)
        return np.array([self._simple_df(row) for row in contrast])

    def _simple_df(self, row: np.ndarray) -> float:
        if self.df_method == "residual":
            return float(self.df_residual)
        touched = np.abs(row) > 1e-12
        return float(np.min(np.where(self.participant_level[touched], self.df_participant_level,
                                     self.df_visit_level)))

    # ----------------------------------------------------------------- joint tests
    def joint(self, contrast: np.ndarray) -> tuple[int, float, float, float]:
        """(num_df, den_df, F, p) for H0: contrast @ beta = 0."""
        contrast = np.atleast_2d(contrast)
        rank = np.linalg.matrix_rank(contrast)
        if rank < contrast.shape[0]:       # drop rows that repeat others
            _, _, vt = np.linalg.svd(contrast, full_matrices=False)
            contrast = vt[:rank]
        l = contrast.shape[0]
        estimate = contrast @ self.beta
        wald = estimate @ np.linalg.solve(contrast @ self.covariance @ contrast.T, estimate)
        f_value = wald / l
        if self.df_method == "kenward_roger":
            scale, den_df = self._kenward_roger_f(contrast)
            if not self.robust:
                f_value *= scale
        elif self.df_method == "satterthwaite":
            den_df = self._satterthwaite_f(contrast)
        else:
            den_df = float(min(self._simple_df(row) for row in contrast))
        p_value = float(stats.f.sf(f_value, l, den_df)) if np.isfinite(den_df) else float(stats.chi2.sf(f_value * l, l))
        return l, float(den_df), float(f_value), p_value

    def _kenward_roger_f(self, contrast: np.ndarray) -> tuple[float, float]:
        l = contrast.shape[0]
        theta = contrast.T @ np.linalg.solve(contrast @ self.model_based @ contrast.T, contrast)
        theta_psi = theta @ self.psi                                             # (q, p, p)
        traces = np.einsum("iaa->i", theta_psi)
        a1 = traces @ self.weights @ traces
        a2 = np.einsum("ij,iab,jba->", self.weights, theta_psi, theta_psi)
        if a2 < 1e-14:
            return 1.0, np.inf
        b = (a1 + 6 * a2) / (2 * l)
        g = ((l + 1) * a1 - (l + 4) * a2) / ((l + 2) * a2)
        denominator = 3 * l + 2 * (1 - g)
        c1, c2, c3 = g / denominator, (l - g) / denominator, (l + 2 - g) / denominator
        e_star = 1 / (1 - a2 / l)
        v_star = (2 / l) * (1 + c1 * b) / ((1 - c2 * b) ** 2 * (1 - c3 * b))
        rho = v_star / (2 * e_star ** 2)
        m = 4 + (l + 2) / (l * rho - 1)
        scale = m / (e_star * (m - 2))
        if not (np.isfinite(m) and m > 2 and scale > 0):
            self.notes.append(f"Kenward-Roger F test of {l} df: the moment matching failed (m = {m:.3g}); "
                              "the unscaled F with the smallest one-df Kenward-Roger df was used instead")
            return 1.0, float(np.min(self.one_df(contrast)))
        return float(scale), float(m)

    def _satterthwaite_f(self, contrast: np.ndarray) -> float:
        values, vectors = np.linalg.eigh(contrast @ self.phi @ contrast.T)
        rotated = vectors.T @ contrast
        nu = self.one_df(rotated)
        l = contrast.shape[0]
        usable = nu > 2
        expectation = np.sum(nu[usable] / (nu[usable] - 2))
        if expectation > l:
            return float(2 * expectation / (expectation - l))
        self.notes.append(f"Satterthwaite F test of {l} df: the one-df values ({np.round(nu, 2).tolist()}) give no "
                          "valid denominator df; the smallest of them was used instead")
        return float(np.min(nu))


def _jacobians(likelihood: Likelihood, theta: np.ndarray) -> list[np.ndarray]:
    """Per group, dpsi/dtheta: psi the linear entries of Sigma, or theta itself."""
    jacobians = []
    for structure, part in zip(likelihood.structures, likelihood.slices(theta)):
        if structure.linear_entries is None:
            jacobians.append(np.eye(structure.n_parameters))
            continue
        first = structure.derivatives(part, order=1)[1]
        rows, cols = zip(*structure.linear_entries)
        jacobians.append(first[:, list(rows), list(cols)].T)
    return jacobians


def _sandwich(likelihood: Likelihood, evaluation: Evaluation) -> np.ndarray:
    p = len(evaluation.beta)
    meat = np.zeros((p, p))
    for pattern, terms in zip(likelihood.patterns, evaluation.terms):
        residual = pattern.y - pattern.x @ evaluation.beta
        score = np.einsum("nja,jk,nk->na", pattern.x, terms.inverse, residual)
        meat += score.T @ score
    phi = evaluation.xvx_inverse
    return phi @ meat @ phi
