"""The data-augmentation sampler, and the draw of one completed data set from its parameters.

Schafer (1997, Analysis of Incomplete Multivariate Data, ch. 5–6): the model is
yᵢ = Bᵀxᵢ + εᵢ, εᵢ ~ N(0, Σ); the I-step draws every missing value from its conditional normal
given the participant's observed values and the current (B, Σ); the P-step draws from the
complete-data posterior under the Jeffreys prior,
    Σ | Y ~ inverse-Wishart(n − p, S),  S = (Y − XB̂)ᵀ(Y − XB̂),
    B | Σ, Y ~ matrix normal(B̂, (XᵀX)⁻¹, Σ).
A retained (B, Σ) then imputes the data under each participant's assumption
(:func:`draw_completed`, the joint N(m*, Σ*) of :mod:`trialcut.stats.imputation_assumptions`).
Chains, burn-in and seeds are run by :mod:`trialcut.stats.imputation_chains`.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.imputation_assumptions import (
    ASSUMPTIONS, Assumption, participant_rules, reference_based_covariance,
)
from trialcut.stats.imputation_data import ImputationData, _full_rank
from trialcut.stats.names import IMPUTATION_ASSUMPTIONS

@dataclass(frozen=True)
class ModelParameters:
    """coefficients[k] = (1 + q, T): row 0 arm k's visit means at the covariate average,
    rows 1.. the covariate slopes; covariances[k] = Σ of arm k (all equal when common)."""

    coefficients: np.ndarray   # (K, 1 + q, T)
    covariances: np.ndarray    # (K, T, T)

    def means(self, data: ImputationData, arm_index: np.ndarray | None = None) -> np.ndarray:
        arm_index = data.arm_index if arm_index is None else arm_index
        chosen = np.take(self.coefficients, arm_index, axis=0)     # (n, 1 + q, T)
        return chosen[:, 0, :] + np.einsum("nq,nqt->nt", data.covariates, chosen[:, 1:, :])


def _inverse_wishart(nu: int, scale: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Σ ~ IW(ν, S) by Bartlett's decomposition: Σ⁻¹ = C⁻ᵀAAᵀC⁻¹ with S = CCᵀ."""
    t = scale.shape[0]
    bartlett = np.tril(rng.standard_normal((t, t)), -1)
    bartlett[np.diag_indices(t)] = np.sqrt(rng.chisquare(nu - np.arange(t)))
    g = np.linalg.cholesky(scale) @ np.linalg.inv(bartlett).T   # C A⁻ᵀ
    return g @ g.T

# --------------------------------------------------------------------------- conditional draws
@dataclass(frozen=True)
class _Pattern:
    rows: np.ndarray
    observed: np.ndarray
    missing: np.ndarray
    arm: int


class _Block:
    """One conditional draw: y[rows, missing] given y[rows, given], index grids made once
    because the sampler repeats the same draws thousands of times."""

    def __init__(self, rows: np.ndarray, missing: np.ndarray, given: np.ndarray, arm: int):
        self.rows, self.missing, self.given, self.arm = rows, missing, given, arm
        self.rows_missing = (rows[:, None], missing[None, :])
        self.rows_given = (rows[:, None], given[None, :])
        self.missing_missing = (missing[:, None], missing[None, :])
        self.missing_given = (missing[:, None], given[None, :])
        self.given_given = (given[:, None], given[None, :])


def _patterns(keys: np.ndarray, mask: np.ndarray, arm_index: np.ndarray) -> list[_Pattern]:
    """Participants grouped by a key row; a fixed sort order keeps the random stream fixed."""
    unique, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    groups = []
    for g in range(unique.shape[0]):
        rows = np.flatnonzero(inverse == g)
        first = rows[0]
        groups.append(_Pattern(rows, np.flatnonzero(~mask[first]), np.flatnonzero(mask[first]), int(arm_index[first])))
    return groups


def _draw_conditional(y: np.ndarray, block: _Block, mean: np.ndarray, sigma: np.ndarray,
                      rng: np.random.Generator) -> None:
    """Replace y[rows, missing] by a draw from N(mean, Σ) given y[rows, given]; mean is (n, T)."""
    centre = mean[block.rows_missing]
    spread = sigma[block.missing_missing]
    if block.given.size:
        cross = sigma[block.missing_given]
        gain = np.linalg.solve(sigma[block.given_given], cross.T).T
        centre = centre + (y[block.rows_given] - mean[block.rows_given]) @ gain.T
        spread = spread - gain @ cross.T
    root = np.linalg.cholesky((spread + spread.T) / 2)
    y[block.rows_missing] = centre + rng.standard_normal(centre.shape) @ root.T


class _BatchedConditional:
    """Every participant's missing values given their observed ones in a few batched calls.

    With Λ = Σ⁻¹ and D the diagonal indicator of a pattern's missing visits, the matrix
    A = DΛD + (I − D) is Λ_MM on the missing visits and the identity elsewhere, so that
    y_M = μ_M − Λ_MM⁻¹Λ_MO(y_O − μ_O) + e with cov(e) = Λ_MM⁻¹ (the conditional normal written
    with the precision matrix) becomes one padded T × T system per participant.
    """

    def __init__(self, mask: np.ndarray, arm_index: np.ndarray):
        self.rows = np.flatnonzero(mask.any(axis=1))
        keys = np.column_stack([arm_index, mask])[self.rows]
        unique, inverse = np.unique(keys, axis=0, return_inverse=True)
        self.pattern_of = inverse.ravel()
        self.pattern_arm = unique[:, 0]
        self.pattern_mask = unique[:, 1:].astype(float)
        self.mask = mask[self.rows]
        self.arm = arm_index[self.rows]

    def draw(self, y: np.ndarray, mean: np.ndarray, covariances: np.ndarray, rng: np.random.Generator) -> None:
        if self.rows.size == 0:
            return
        t = y.shape[1]
        precision = np.linalg.inv(covariances)
        d = self.pattern_mask
        padded = d[:, :, None] * precision[self.pattern_arm] * d[:, None, :] + np.eye(t) * (1.0 - d)[:, None, :]
        root_inverse = np.linalg.inv(np.linalg.cholesky(padded))           # L⁻¹ with A = LLᵀ
        noise_map = root_inverse.transpose(0, 2, 1)                          # L⁻ᵀ: cov A⁻¹
        gain = -(noise_map @ root_inverse) @ (d[:, :, None] * precision[self.pattern_arm])   # −A⁻¹DΛ
        centre = np.take(mean, self.rows, axis=0)
        current = np.take(y, self.rows, axis=0)
        residual = np.where(self.mask, 0.0, current - centre)
        combined = np.take(np.concatenate([gain, noise_map], axis=2), self.pattern_of, axis=0)
        draw = np.einsum("nij,nj->ni", combined,
                         np.concatenate([residual, rng.standard_normal((self.rows.size, t))], axis=1))
        y[self.rows] = np.where(self.mask, centre + draw, current)


class _Sampler:
    """Data augmentation for the MAR model; its draws feed every assumption."""

    def __init__(self, data: ImputationData, covariance_by_arm: bool):
        self.data = data
        self.by_arm = covariance_by_arm
        n_arms = len(data.arms)
        q = data.covariates.shape[1]
        if covariance_by_arm:
            self.groups = [np.flatnonzero(data.arm_index == k) for k in range(n_arms)]
            designs = [np.column_stack([np.ones(g.size), data.covariates[g]]) for g in self.groups]
        else:
            self.groups = [np.arange(len(data.subjects))]
            indicators = (data.arm_index[:, None] == np.arange(n_arms)[None, :]).astype(float)
            designs = [np.column_stack([indicators, data.covariates])]
        self.designs = designs
        for x in designs:
            if x.shape[0] <= x.shape[1] or not _full_rank(np.linalg.qr(x)[1], x):
                raise ModelSpecificationError("the imputation model cannot be estimated", [Problem(
                    code="stats.imputation_rank", message="the imputation model's design is rank deficient "
                    "or has no more participants than columns (a covariate that does not vary, or too few "
                    "participants in an arm)", expected=f"more than {x.shape[1]} participants per group "
                    "and covariates that vary", got=f"{x.shape[0]} participants")])
        self.unscaled = [np.linalg.inv(x.T @ x) for x in designs]
        self.unscaled_roots = [np.linalg.cholesky(u) for u in self.unscaled]
        self.i_step = _BatchedConditional(data.missing, data.arm_index)
        self.n_arms, self.q = n_arms, q

    def start(self) -> tuple[np.ndarray, ModelParameters]:
        """Missing values filled with the arm's observed visit mean, then least squares."""
        y = self.data.outcome.copy()
        for k in range(self.n_arms):
            rows = self.data.arm_index == k
            fill = np.nanmean(y[rows], axis=0)
            y[rows] = np.where(np.isnan(y[rows]), fill, y[rows])
        return y, self._parameters(y, rng=None)

    def step(self, y: np.ndarray, parameters: ModelParameters, rng: np.random.Generator) -> ModelParameters:
        """One I-step (in place on y) and one P-step."""
        self.i_step.draw(y, parameters.means(self.data), parameters.covariances, rng)
        return self._parameters(y, rng)

    def _parameters(self, y: np.ndarray, rng: np.random.Generator | None) -> ModelParameters:
        t = y.shape[1]
        coefficients = np.empty((self.n_arms, 1 + self.q, t))
        covariances = np.empty((self.n_arms, t, t))
        for g, rows in enumerate(self.groups):
            x, unscaled = self.designs[g], self.unscaled[g]
            b_hat = unscaled @ (x.T @ y[rows])
            residual = y[rows] - x @ b_hat
            s = residual.T @ residual
            nu = rows.size - x.shape[1]
            if rng is None:
                sigma, b = s / nu, b_hat
            else:
                sigma = _inverse_wishart(nu, s, rng)
                b = b_hat + self.unscaled_roots[g] @ rng.standard_normal(b_hat.shape) @ np.linalg.cholesky(sigma).T
            self._store(g, b, sigma, coefficients, covariances)
        return ModelParameters(coefficients, covariances)

    def _store(self, g, b, sigma, coefficients, covariances) -> None:
        if self.by_arm:
            coefficients[g], covariances[g] = b, sigma
            return
        coefficients[:, 0, :] = b[:self.n_arms]
        coefficients[:, 1:, :] = b[self.n_arms:][None]
        covariances[:] = sigma[None]


class _CommonSlopeSampler(_Sampler):
    """Covariate effects common to all visits: μᵢ = M[armᵢ] + (cᵢᵀγ)·1.  The mean parameters
    θ = (vec M, γ) are no longer a matrix-normal block, so the P-step is a two-block Gibbs
    step: θ | Σ, Y ~ N(I⁻¹r, I⁻¹) with the generalized least-squares information
    I = Σᵢ XᵢᵀΣ⁻¹Xᵢ and r = Σᵢ XᵢᵀΣ⁻¹yᵢ, then Σ | θ, Y ~ inverse-Wishart(n, Σᵢ eᵢeᵢᵀ) under
    the same Jeffreys prior (n, not n − p: θ is conditioned on, not integrated out)."""

    def __init__(self, data: ImputationData, covariance_by_arm: bool):
        super().__init__(data, covariance_by_arm)
        # Per arm: rows, count, covariates, their sums and cross-products — fixed for the data,
        # so made once rather than at each of a chain's thousands of steps.
        c = data.covariates
        self._arm_sums = []
        for k in range(self.n_arms):
            rows = np.flatnonzero(data.arm_index == k)
            self._arm_sums.append((rows, rows.size, c[rows], c[rows].sum(axis=0), c[rows].T @ c[rows].copy()))

    def step(self, y: np.ndarray, parameters: ModelParameters, rng: np.random.Generator) -> ModelParameters:
        self.i_step.draw(y, parameters.means(self.data), parameters.covariances, rng)
        means, gamma = self._draw_means(y, parameters.covariances, rng)
        coefficients = np.empty_like(parameters.coefficients)
        coefficients[:, 0, :] = means
        coefficients[:, 1:, :] = gamma[None, :, None]
        residual = y - np.take(means, self.data.arm_index, axis=0) - (self.data.covariates @ gamma)[:, None]
        covariances = np.empty_like(parameters.covariances)
        for g, rows in enumerate(self.groups):
            # One copy where there were two; still two distinct operands, so that numpy keeps
            # the general matrix product (the same bits) rather than the symmetric one it uses for A.T @ A.
            own = residual if rows.size == len(residual) else np.take(residual, rows, axis=0)
            sigma = _inverse_wishart(rows.size, own.T @ own.copy(), rng)
            if self.by_arm:
                covariances[g] = sigma
            else:
                covariances[:] = sigma[None]
        return ModelParameters(coefficients, covariances)

    def _draw_means(self, y, covariances, rng) -> tuple[np.ndarray, np.ndarray]:
        k_arms, t, q = self.n_arms, y.shape[1], self.q
        slope = slice(k_arms * t, k_arms * t + q)
        information = np.zeros((k_arms * t + q,) * 2)
        score = np.zeros(k_arms * t + q)
        for k, lam in enumerate(np.linalg.inv(covariances)):
            rows, count, c_rows, c_sum, c_cross = self._arm_sums[k]
            block = slice(k * t, (k + 1) * t)
            lam_one = lam.sum(axis=1)                                   # Λ1
            information[block, block] = count * lam
            information[block, slope] = np.outer(lam_one, c_sum)
            information[slope, block] = information[block, slope].T
            information[slope, slope] += lam_one.sum() * c_cross
            y_rows = np.take(y, rows, axis=0)
            score[block] = lam @ y_rows.sum(axis=0)
            score[slope] += c_rows.T @ (y_rows @ lam_one)
        root = np.linalg.cholesky(information)
        theta = np.linalg.solve(information, score) + np.linalg.solve(root.T, rng.standard_normal(score.size))
        return theta[:k_arms * t].reshape(k_arms, t), theta[slope]

@dataclass(frozen=True)
class _Step:
    """One draw for a group of participants imputed alike: every missing value at once from
    the conditional normal given every observed value, under ``rule`` from visit ``deviation``
    on (None: the participant's own-arm model, which is also what MAR means after an event)."""

    block: _Block
    deviation: int | None
    rule: Assumption

def imputation_steps(data: ImputationData, assumption: str | Assumption | Sequence[str]) -> list[_Step]:
    """Groups of participants imputed alike, fixed for the data and the assumption(s).

    One rule for every pattern (Carpenter, Roger & Kenward 2013, section 3): a participant of an
    active arm with an intercurrent event at visit d, under a reference-based assumption, has the
    joint distribution N(m*, Σ*) over all visits, and every missing value — before d as well as
    from d on — is drawn from its conditional given everything observed, before and after d.
    A gap before the event is therefore imputed the same way whether or not a value after the
    event is also missing."""
    rules = participant_rules(data, assumption)
    reference_based = np.array([r.reference_based for r in rules], dtype=bool)
    rule_index = np.array([IMPUTATION_ASSUMPTIONS.index(r.name) for r in rules], dtype=int)
    mask = data.missing
    t = len(data.visits)
    affected = (data.deviation < t) & (data.arm_index > 0) & reference_based
    deviation = np.where(affected, data.deviation, t)
    rows = mask.any(axis=1)
    keys = np.column_stack([data.arm_index, np.where(affected, rule_index, -1), deviation, mask])[rows]
    steps = []
    for p in _patterns(keys, mask[rows], data.arm_index[rows]):
        members = np.flatnonzero(rows)[p.rows]
        d = int(deviation[members[0]])
        block = _Block(members, p.missing, p.observed, p.arm)
        steps.append(_Step(block, None, ASSUMPTIONS["mar"]) if d >= t else _Step(block, d, rules[members[0]]))
    return steps

def draw_completed(data: ImputationData, parameters: ModelParameters, assumption: str | Assumption | Sequence[str],
                   rng: np.random.Generator, steps: list[_Step] | None = None) -> np.ndarray:
    """One completed (n, T) outcome matrix under the assumption(s), given (B, Σ)."""
    steps = imputation_steps(data, assumption) if steps is None else steps
    y = data.outcome.copy()
    own = parameters.means(data)
    needs_reference = any(step.deviation is not None for step in steps)
    reference = parameters.means(data, np.zeros_like(data.arm_index)) if needs_reference else own
    for step in steps:
        sigma_own = parameters.covariances[step.block.arm]
        if step.deviation is None:
            _draw_conditional(y, step.block, own, sigma_own, rng)
            continue
        joint_mean = np.zeros_like(own)
        rows = step.block.rows
        joint_mean[rows] = step.rule.joint_mean(own[rows], reference[rows], step.deviation)
        joint_sigma = reference_based_covariance(sigma_own, parameters.covariances[0], step.deviation)
        _draw_conditional(y, step.block, joint_mean, joint_sigma, rng)
    return y
