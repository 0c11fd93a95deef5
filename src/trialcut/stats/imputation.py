"""Multiple imputation of a repeatedly measured outcome under MAR and reference-based assumptions.

The imputation model is the multivariate normal regression of the post-baseline visit
vector yᵢ (length T) on xᵢ: yᵢ = Bᵀxᵢ + εᵢ, εᵢ ~ N(0, Σ).  With a common covariance xᵢ holds
one indicator per arm (the arm-by-visit means) and the centred covariates (their effects
differ by visit); with ``covariance_by_arm`` each arm has its own B and Σ (xᵢ = intercept and
covariates), so covariate effects then also differ by arm.

Posterior draws come from data augmentation (Schafer 1997, Analysis of Incomplete
Multivariate Data, ch. 5–6): the I-step draws every missing value from its conditional
normal given the participant's observed values and the current (B, Σ); the P-step draws
from the complete-data posterior under the Jeffreys prior,
    Σ | Y ~ inverse-Wishart(n − p, S),  S = (Y − XB̂)ᵀ(Y − XB̂),
    B | Σ, Y ~ matrix normal(B̂, (XᵀX)⁻¹, Σ).
Intermittent values are handled by the same conditional step as monotone ones.

Each retained draw of (B, Σ) then imputes the data under an assumption for the values
missing from a participant's first visit affected by an intercurrent event onwards
(Carpenter, Roger & Kenward 2013, J Biopharm Stat 23:1352–1371): with μₐ the participant's
mean vector in their own arm, μᵣ in the reference arm and d the first affected visit,
    MAR  m* = μₐ
    J2R  m* = (μₐ before d, μᵣ from d)
    CR   m* = μᵣ
    CIR  m* = (μₐ before d, μₐ[d−1] + μᵣ[j] − μᵣ[d−1] for j ≥ d)
and the joint covariance keeps the own arm's block before d and the reference arm's
conditional of later visits given earlier ones:
    Σ*₁₁ = Σₐ₁₁,  Σ*₂₁ = Σᵣ₂₁Σᵣ₁₁⁻¹Σₐ₁₁,
    Σ*₂₂ = Σᵣ₂₂ − Σᵣ₂₁Σᵣ₁₁⁻¹(Σᵣ₁₁ − Σₐ₁₁)Σᵣ₁₁⁻¹Σᵣ₁₂.
One rule for every pattern: all of an affected participant's missing values, before d as
well as from d on, are drawn together from the conditional normal of N(m*, Σ*) given every
observed value (before and after d).  Before d the marginal of N(m*, Σ*) is the own arm's
model, so a gap before the event is missing at random, and it also draws on values observed
after the event, whether or not a later value is missing.  The assumption can differ between
participants (e.g. by the reason for the event): ``assumption`` is then one name per participant.

Parallel work and reproducibility: the m imputations are split into ``chains``
independent chains (each with its own burn-in), a split that depends only on m and
``chains``, never on the executor.  Imputation k draws every random number it needs (its
share of the chain's iterations and its own imputation) from the k-th child of the root
SeedSequence, so results are identical for any executor and worker count.  Each chain also
analyses its completed data sets, so only small arrays travel back.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Protocol, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.names import IMPUTATION_ASSUMPTIONS
from trialcut.stats.pooling import PooledEstimate, rubin_pool


COVARIATE_EFFECTS = ("by_visit", "common")


# --------------------------------------------------------------------------- assumptions
class Assumption(Protocol):
    """How the mean vector of a participant affected from visit index d is built."""

    name: str
    reference_based: bool

    def joint_mean(self, own: np.ndarray, reference: np.ndarray, deviation: int) -> np.ndarray:
        """own, reference: (rows, T) mean vectors; returns m* of the same shape."""


@dataclass(frozen=True)
class MissingAtRandom:
    name: str = "mar"
    reference_based: bool = False

    def joint_mean(self, own, reference, deviation):
        return own


@dataclass(frozen=True)
class JumpToReference:
    name: str = "jump_to_reference"
    reference_based: bool = True

    def joint_mean(self, own, reference, deviation):
        return np.concatenate([own[:, :deviation], reference[:, deviation:]], axis=1)


@dataclass(frozen=True)
class CopyReference:
    name: str = "copy_reference"
    reference_based: bool = True

    def joint_mean(self, own, reference, deviation):
        return reference


@dataclass(frozen=True)
class CopyIncrementsInReference:
    name: str = "copy_increments_in_reference"
    reference_based: bool = True

    def joint_mean(self, own, reference, deviation):
        if deviation == 0:
            return reference   # no visit before the event: nothing of the own arm to carry
        last = deviation - 1
        later = own[:, last:last + 1] + reference[:, deviation:] - reference[:, last:last + 1]
        return np.concatenate([own[:, :deviation], later], axis=1)


ASSUMPTIONS: dict[str, Assumption] = {
    a.name: a for a in (MissingAtRandom(), JumpToReference(), CopyReference(), CopyIncrementsInReference())
}


def reference_based_covariance(own: np.ndarray, reference: np.ndarray, deviation: int) -> np.ndarray:
    """Σ* of Carpenter, Roger & Kenward (2013): own block before d, reference conditional after."""
    d = deviation
    if d == 0:
        return reference.copy()
    if d >= own.shape[0]:
        return own.copy()
    r11, r12, r22 = reference[:d, :d], reference[:d, d:], reference[d:, d:]
    a11 = own[:d, :d]
    regression = np.linalg.solve(r11, r12).T          # Σᵣ₂₁Σᵣ₁₁⁻¹
    joint = np.empty_like(own)
    joint[:d, :d] = a11
    joint[d:, :d] = regression @ a11
    joint[:d, d:] = joint[d:, :d].T
    joint[d:, d:] = r22 - regression @ (r11 - a11) @ regression.T
    return joint


# --------------------------------------------------------------------------- prepared data
@dataclass(frozen=True)
class ImputationData:
    """Wide arrays for the sampler; arms[0] is the reference arm."""

    subjects: tuple[Any, ...]
    visits: tuple[str, ...]
    arms: tuple[str, ...]
    outcome: np.ndarray          # (n, T), NaN where missing
    arm_index: np.ndarray        # (n,), 0 = reference
    covariates: np.ndarray       # (n, q), centred over all participants
    covariate_names: tuple[str, ...]
    deviation: np.ndarray        # (n,), first visit index affected by an intercurrent event; T if none
    # (n, T): the frame has a row for this participant and visit, i.e. the visit was due at the
    # cut-off.  A cell without a row is a visit not yet due: the sampler carries it as a latent
    # value (ignorable, like any value the cut-off withholds), but it is never counted as
    # imputed, never shifted and never analysed.  None: every visit is due.
    scheduled: np.ndarray | None = None

    @property
    def missing(self) -> np.ndarray:
        return np.isnan(self.outcome)

    @property
    def due(self) -> np.ndarray:
        return np.ones(self.outcome.shape, dtype=bool) if self.scheduled is None else self.scheduled

    @property
    def imputed(self) -> np.ndarray:
        """(n, T): values imputed and analysed: missing at a visit that was due."""
        return self.missing & self.due

    @property
    def after_event(self) -> np.ndarray:
        """(n, T): an imputed value at or after the participant's first affected visit."""
        return self.imputed & (np.arange(len(self.visits))[None, :] >= self.deviation[:, None])


def prepare_data(frame: pd.DataFrame, *, subject: str, arm: str, visit: str, outcome: str,
                 visits: Sequence[str], reference: str, covariates: Sequence[str] = (),
                 event: str | Mapping[Any, Any] | None = None,
                 arms: Sequence[str] | None = None) -> ImputationData:
    """Long frame (one row per participant × scheduled visit) to the sampler's arrays.

    ``event``: None (every missing value is MAR), the name of a boolean column that is true
    on rows at or after an intercurrent event, or a mapping participant -> first affected
    visit label (None when unaffected).
    """
    _check_columns(frame, [subject, arm, visit, outcome, *covariates]
                   + ([event] if isinstance(event, str) else []))
    visits = tuple(str(v) for v in visits)
    long = frame.assign(**{visit: frame[visit].astype(str)})
    _check_visits(long, subject, visit, visits)
    per_subject = long.groupby(subject, sort=True, observed=True)
    arm_of = per_subject[arm].first()
    arm_order = _arm_order(arm_of, reference, arms)
    wide = long.pivot(index=subject, columns=visit, values=outcome).reindex(index=arm_of.index, columns=list(visits))
    rows = long.assign(_row=1.0).pivot(index=subject, columns=visit, values="_row")
    scheduled = rows.reindex(index=arm_of.index, columns=list(visits)).notna().to_numpy()
    design, names = _covariate_matrix(long, subject, covariates, arm_of.index)
    deviation = _deviation(long, subject, visit, visits, event, arm_of.index)
    return ImputationData(
        subjects=tuple(arm_of.index), visits=visits, arms=arm_order,
        outcome=wide.to_numpy(dtype=float), arm_index=arm_of.map({a: k for k, a in enumerate(arm_order)}).to_numpy(int),
        covariates=design - design.mean(axis=0), covariate_names=names, deviation=deviation,
        scheduled=None if scheduled.all() else scheduled,
    )


def _check_columns(frame, columns) -> None:
    absent = [c for c in columns if c not in frame.columns]
    if absent:
        raise ModelSpecificationError("columns are missing from the data", [
            Problem(code="stats.missing_column", message=f"column {c!r} is not in the data", field=c,
                    expected="one of " + ", ".join(map(str, frame.columns))) for c in absent])


def _check_visits(long, subject, visit, visits) -> None:
    problems = []
    unknown = sorted(set(long[visit]) - set(visits))
    if unknown:
        problems.append(Problem(code="stats.unknown_visit", message="rows at visits outside the schedule",
                                field=visit, expected=", ".join(visits), got=", ".join(unknown[:5])))
    duplicated = long[long.duplicated([subject, visit], keep=False)]
    if len(duplicated):
        problems.append(Problem(code="stats.duplicate_visit", message="more than one row per participant and visit",
                                field=visit, rows=tuple(duplicated[subject].unique()[:5])))
    if problems:
        raise ModelSpecificationError("the data do not have one row per participant and visit", problems)


def _arm_order(arm_of: pd.Series, reference: str, arms) -> tuple[str, ...]:
    present = [str(a) for a in pd.unique(arm_of)]
    order = [str(a) for a in arms] if arms is not None else sorted(present)
    if reference not in present or set(present) - set(order):
        raise ModelSpecificationError("the arms do not match the data", [
            Problem(code="stats.arms", message="the reference arm and every arm in the data must be known",
                    expected=f"reference {reference!r} among {order}", got=", ".join(present))])
    return (reference, *[a for a in order if a != reference and a in present])


def _covariate_matrix(long, subject, covariates, index) -> tuple[np.ndarray, tuple[str, ...]]:
    if not covariates:
        return np.empty((len(index), 0)), ()
    per_subject = long.groupby(subject, sort=True, observed=True)
    varying = [c for c in covariates if (per_subject[c].nunique(dropna=False) > 1).any()]
    values = per_subject[list(covariates)].first().reindex(index)
    absent = [c for c in covariates if values[c].isna().any()]
    problems = [Problem(code="stats.covariate_varies", message=f"covariate {c!r} changes within a participant",
                        field=c, hint="imputation covariates are measured once, before randomisation")
                for c in varying]
    problems += [Problem(code="stats.covariate_missing", message=f"covariate {c!r} is missing",
                         field=c, rows=tuple(values.index[values[c].isna()][:5])) for c in absent]
    if problems:
        raise ModelSpecificationError("imputation covariates must be complete and fixed per participant", problems)
    blocks, names = [], []
    for c in covariates:
        column = values[c]
        if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
            blocks.append(column.to_numpy(float)[:, None])
            names.append(c)
        else:   # indicators of every level but the first, as in the analysis model
            dummies = pd.get_dummies(column.astype(str), prefix=c, prefix_sep="=", drop_first=True, dtype=float)
            blocks.append(dummies.to_numpy())
            names.extend(dummies.columns)
    return np.column_stack(blocks), tuple(names)


def _deviation(long, subject, visit, visits, event, index) -> np.ndarray:
    position = {v: j for j, v in enumerate(visits)}
    first = pd.Series(len(visits), index=index, dtype=int)
    if event is None:
        return first.to_numpy()
    if isinstance(event, str):
        flagged = long[long[event].fillna(False).astype(bool)]
        found = flagged[visit].map(position).groupby(flagged[subject]).min()
    else:
        found = pd.Series({s: position[str(v)] for s, v in event.items() if v is not None and not pd.isna(v)},
                          dtype=int)
    found = found[found.index.isin(index)]
    first.loc[found.index] = found.astype(int)
    return first.to_numpy()


# --------------------------------------------------------------------------- parameters
@dataclass(frozen=True)
class ModelParameters:
    """coefficients[k] = (1 + q, T): row 0 arm k's visit means at the covariate average,
    rows 1.. the covariate slopes; covariances[k] = Σ of arm k (all equal when common)."""

    coefficients: np.ndarray   # (K, 1 + q, T)
    covariances: np.ndarray    # (K, T, T)

    def means(self, data: ImputationData, arm_index: np.ndarray | None = None) -> np.ndarray:
        arm_index = data.arm_index if arm_index is None else arm_index
        chosen = self.coefficients[arm_index]                      # (n, 1 + q, T)
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
        centre = mean[self.rows]
        residual = np.where(self.mask, 0.0, y[self.rows] - centre)
        combined = np.concatenate([gain, noise_map], axis=2)[self.pattern_of]
        draw = np.einsum("nij,nj->ni", combined,
                         np.concatenate([residual, rng.standard_normal((self.rows.size, t))], axis=1))
        y[self.rows] = np.where(self.mask, centre + draw, y[self.rows])


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

    def step(self, y: np.ndarray, parameters: ModelParameters, rng: np.random.Generator) -> ModelParameters:
        self.i_step.draw(y, parameters.means(self.data), parameters.covariances, rng)
        means, gamma = self._draw_means(y, parameters.covariances, rng)
        coefficients = np.empty_like(parameters.coefficients)
        coefficients[:, 0, :] = means
        coefficients[:, 1:, :] = gamma[None, :, None]
        residual = y - means[self.data.arm_index] - (self.data.covariates @ gamma)[:, None]
        covariances = np.empty_like(parameters.covariances)
        for g, rows in enumerate(self.groups):
            sigma = _inverse_wishart(rows.size, residual[rows].T @ residual[rows], rng)
            if self.by_arm:
                covariances[g] = sigma
            else:
                covariances[:] = sigma[None]
        return ModelParameters(coefficients, covariances)

    def _draw_means(self, y, covariances, rng) -> tuple[np.ndarray, np.ndarray]:
        k_arms, t, q = self.n_arms, y.shape[1], self.q
        c, slope = self.data.covariates, slice(k_arms * t, k_arms * t + q)
        information = np.zeros((k_arms * t + q,) * 2)
        score = np.zeros(k_arms * t + q)
        for k, lam in enumerate(np.linalg.inv(covariances)):
            rows = self.data.arm_index == k
            block = slice(k * t, (k + 1) * t)
            lam_one = lam.sum(axis=1)                                   # Λ1
            information[block, block] = rows.sum() * lam
            information[block, slope] = np.outer(lam_one, c[rows].sum(axis=0))
            information[slope, block] = information[block, slope].T
            information[slope, slope] += lam_one.sum() * (c[rows].T @ c[rows])
            score[block] = lam @ y[rows].sum(axis=0)
            score[slope] += c[rows].T @ (y[rows] @ lam_one)
        root = np.linalg.cholesky(information)
        theta = np.linalg.solve(information, score) + np.linalg.solve(root.T, rng.standard_normal(score.size))
        return theta[:k_arms * t].reshape(k_arms, t), theta[slope]


# --------------------------------------------------------------------------- one imputation
@dataclass(frozen=True)
class _Step:
    """One draw for a group of participants imputed alike: every missing value at once from
    the conditional normal given every observed value, under ``rule`` from visit ``deviation``
    on (None: the participant's own-arm model, which is also what MAR means after an event)."""

    block: _Block
    deviation: int | None
    rule: Assumption


def participant_rules(data: ImputationData, assumption: str | Assumption | Sequence[str]) -> tuple[Assumption, ...]:
    """One assumption per participant: the same for all, or one name per participant (in
    ``data.subjects`` order), e.g. chosen by the reason for an intercurrent event."""
    if isinstance(assumption, (str, MissingAtRandom, JumpToReference, CopyReference, CopyIncrementsInReference)):
        return (_rule(assumption),) * len(data.subjects)
    names = tuple(assumption)
    if len(names) != len(data.subjects):
        raise ModelSpecificationError("one imputation assumption per participant is needed", [Problem(
            code="stats.assumption_count", message="the per-participant assumptions do not match the participants",
            expected=f"{len(data.subjects)} assumptions", got=str(len(names)))])
    return tuple(_rule(name) for name in names)


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


def _rule(assumption: str | Assumption) -> Assumption:
    return ASSUMPTIONS[assumption] if isinstance(assumption, str) else assumption


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


# --------------------------------------------------------------------------- shifts (δ)
def shift_matrix(data: ImputationData, delta_by_arm: np.ndarray, cumulative: bool = False) -> np.ndarray:
    """(n, T) shift added to imputed values: δ[arm, visit] on every imputed cell, or, when
    cumulative, the running sum of δ over the participant's imputed visits so far."""
    imputed = data.imputed.astype(float)
    step = delta_by_arm[data.arm_index] * imputed
    return imputed * np.cumsum(step, axis=1) if cumulative else step


# --------------------------------------------------------------------------- chains
@dataclass(frozen=True)
class ChainTask:
    data: ImputationData
    assumption: str | tuple[str, ...]     # one for all, or one per participant
    covariance_by_arm: bool
    burn_in: int
    thinning: int
    seeds: tuple[np.random.SeedSequence, ...]     # one per imputation of this chain
    scenarios: np.ndarray                           # (S, K, T) δ by arm and visit
    cumulative: bool
    analysis: "RepeatedMeasuresAnalysis | None" = None   # None: ANCOVA at each visit
    covariate_effects: str = "by_visit"


@dataclass(frozen=True)
class ChainOutput:
    estimates: np.ndarray      # (m_chain, S, K − 1, T)
    variances: np.ndarray      # same shape
    complete_df: np.ndarray    # same shape: the complete-data df of each analysis
    trace: np.ndarray          # (m_chain, n_trace): key parameters of each retained draw


def run_chain(task: ChainTask) -> ChainOutput:
    """One chain: burn-in, then per imputation thin, impute, shift and analyse."""
    sampler_class = _CommonSlopeSampler if task.covariate_effects == "common" else _Sampler
    sampler = sampler_class(task.data, task.covariance_by_arm)
    y, parameters = sampler.start()
    shifts = np.stack([shift_matrix(task.data, s, task.cumulative) for s in task.scenarios])
    steps = imputation_steps(task.data, task.assumption)
    core = VisitAncova(task.data)
    estimates, variances, dfs, traces = [], [], [], []
    for position, seed in enumerate(task.seeds):
        rng = np.random.default_rng(seed)
        for _ in range(task.burn_in + task.thinning if position == 0 else task.thinning):
            parameters = sampler.step(y, parameters, rng)
        completed = draw_completed(task.data, parameters, task.assumption, rng, steps)
        if task.analysis is None:
            estimate, variance = core.analyse(completed, shifts)
            df = np.broadcast_to(core.df, estimate.shape).astype(float)
        else:
            estimate, variance, df = task.analysis.analyse(task.data, completed, shifts)
        estimates.append(estimate)
        variances.append(variance)
        dfs.append(df)
        traces.append(_trace(parameters, task.covariance_by_arm))
    return ChainOutput(np.stack(estimates), np.stack(variances), np.stack(dfs), np.stack(traces))


@dataclass(frozen=True)
class RepeatedMeasuresAnalysis:
    """Completed data sets analysed by trialcut's repeated-measures model (``fit_mmrm``)
    instead of ANCOVA at each visit: one fit per completed data set and shift.  Covariates
    get an effect at each visit, as in the imputation model, so the two stay congenial."""

    covariance: str = "unstructured"
    df: str = "kenward_roger"
    method: str = "reml"
    covariates_by_visit: bool = True

    def analyse(self, data: ImputationData, completed: np.ndarray, shifts: np.ndarray):
        from trialcut.stats.mmrm import fit_mmrm   # imported here: the ANCOVA path never needs it

        names = [f"covariate_{i}" for i in range(data.covariates.shape[1])]
        n, t = completed.shape
        base = pd.DataFrame({"subject": np.repeat(np.arange(n), t), "visit": np.tile(np.array(data.visits), n),
                             "arm": np.repeat(np.array(data.arms)[data.arm_index], t)})
        for i, name in enumerate(names):
            base[name] = np.repeat(data.covariates[:, i], t)
        shape = (shifts.shape[0], len(data.arms) - 1, t)
        estimate, variance, df = np.empty(shape), np.empty(shape), np.empty(shape)
        for s, shift in enumerate(shifts):
            # A visit not yet due has no value to analyse: its latent draw is left out of the fit.
            values = np.where(data.due, completed + shift, np.nan)
            fit = fit_mmrm(base.assign(y=values.ravel()), outcome="y", subject="subject",
                           visit="visit", arm="arm", reference=data.arms[0], visits=list(data.visits),
                           covariates=tuple(names), covariates_by_visit=tuple(names) if self.covariates_by_visit else (),
                           covariance=self.covariance,
                           method=self.method, df=self.df)
            table = fit.differences().set_index(["arm", "visit"])
            for k, arm in enumerate(data.arms[1:]):
                rows = table.loc[arm].loc[list(data.visits)]
                estimate[s, k], variance[s, k] = rows["estimate"], rows["se"].to_numpy() ** 2
                df[s, k] = rows["df"]
        return estimate, variance, df


def _full_rank(r: np.ndarray, design: np.ndarray, tolerance: float = 1e-10) -> bool:
    """|r_jj| against the length of column j: a test that does not depend on the columns'
    units (the same rule as the per-visit analysis of covariance)."""
    lengths = np.linalg.norm(design, axis=0)
    return bool(np.all(lengths > 0) and np.all(np.abs(np.diag(r)) > tolerance * lengths))


class AncovaCore:
    """Least squares of many outcome columns on one design: intercept, one indicator per
    non-reference arm, covariates (Snedecor & Cochran's analysis of covariance, fitted per
    visit).  The QR factors are made once per chain because the design never changes.
    Kept here rather than reusing the per-visit ANCOVA module so that worker processes do
    not import statsmodels; tests check it against statsmodels OLS."""

    def __init__(self, arm_index: np.ndarray, covariates: np.ndarray, n_arms: int):
        n = arm_index.size
        indicators = (arm_index[:, None] == np.arange(1, n_arms)[None, :]).astype(float)
        design = np.column_stack([np.ones(n), indicators, covariates])
        q, r = np.linalg.qr(design)
        if n <= design.shape[1] or not _full_rank(r, design):
            raise ModelSpecificationError("the analysis model cannot be estimated", [
                Problem(code="stats.ancova_rank", message="the analysis design is rank deficient or saturated",
                        expected=f"more than {design.shape[1]} participants and independent columns",
                        got=f"{n} participants")])
        r_inverse = np.linalg.solve(r, np.eye(design.shape[1]))
        self.design = design
        self.solver = r_inverse @ q.T                       # β̂ = R⁻¹Qᵀy
        self.arm_unscaled = np.diag(r_inverse @ r_inverse.T)[1:n_arms]
        self.df = n - design.shape[1]
        self.n_arms = n_arms

    def fit(self, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(K − 1, m) arm-minus-reference estimates and their variances s²[(XᵀX)⁻¹]ₖₖ."""
        coefficients = self.solver @ y
        residuals = y - self.design @ coefficients
        residual_variance = np.sum(residuals**2, axis=0) / self.df
        return coefficients[1:self.n_arms], np.outer(self.arm_unscaled, residual_variance)


def _analyse(core: AncovaCore, completed: np.ndarray, shifts: np.ndarray):
    """ANCOVA at every visit of every shifted data set in one product."""
    n_scenarios, n, t = shifts.shape
    outcomes = (completed[None] + shifts).transpose(1, 0, 2).reshape(n, n_scenarios * t)
    estimate, variance = core.fit(outcomes)
    return (estimate.reshape(-1, n_scenarios, t).transpose(1, 0, 2),
            variance.reshape(-1, n_scenarios, t).transpose(1, 0, 2))


class VisitAncova:
    """ANCOVA at each visit on the participants whose visit was due: visits due for the same
    participants share one :class:`AncovaCore` (all of them, when every visit is due)."""

    def __init__(self, data: ImputationData):
        due = data.due
        groups: dict[bytes, list[int]] = {}
        for j in range(due.shape[1]):
            groups.setdefault(due[:, j].tobytes(), []).append(j)
        self.parts = []
        for visits in groups.values():
            rows = np.flatnonzero(due[:, visits[0]])
            core = AncovaCore(data.arm_index[rows], data.covariates[rows], len(data.arms))
            self.parts.append((rows, np.array(visits), core))
        self.df = np.empty(due.shape[1])
        for _, visits, core in self.parts:
            self.df[visits] = core.df

    def analyse(self, completed: np.ndarray, shifts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(S, K − 1, T) estimates and variances."""
        n_scenarios, t = shifts.shape[0], completed.shape[1]
        estimate = np.empty((n_scenarios, self.parts[0][2].n_arms - 1, t))
        variance = np.empty_like(estimate)
        for rows, visits, core in self.parts:
            part = _analyse(core, completed[np.ix_(rows, visits)], shifts[:, rows][:, :, visits])
            estimate[:, :, visits], variance[:, :, visits] = part
        return estimate, variance


def _trace(parameters: ModelParameters, by_arm: bool) -> np.ndarray:
    last_visit_means = parameters.coefficients[:, 0, -1]
    covariances = parameters.covariances if by_arm else parameters.covariances[:1]
    log_determinants = np.linalg.slogdet(covariances)[1]
    return np.concatenate([last_visit_means, log_determinants])


def trace_names(data: ImputationData, by_arm: bool) -> list[str]:
    names = [f"mean {arm} at {data.visits[-1]}" for arm in data.arms]
    if by_arm:
        return names + [f"log determinant of covariance ({arm})" for arm in data.arms]
    return names + ["log determinant of covariance"]


def chain_split(n_imputations: int, chains: int) -> list[np.ndarray]:
    """Which imputations each chain produces: depends on m and chains only."""
    return [part for part in np.array_split(np.arange(n_imputations), min(chains, n_imputations))]


# --------------------------------------------------------------------------- the driver
@dataclass(frozen=True)
class ImputationDraws:
    """Per-imputation analyses of every shift scenario, ready for pooling."""

    estimates: np.ndarray       # (S, m, K − 1, T)
    variances: np.ndarray
    complete_df: np.ndarray     # (S, K − 1, T): mean over imputations of the complete-data df
    diagnostics: dict[str, Any]


def run_imputations(data: ImputationData, *, assumption: str | tuple[str, ...], n_imputations: int, burn_in: int,
                    thinning: int, covariance_by_arm: bool, seed_sequence: np.random.SeedSequence,
                    scenarios: np.ndarray | None = None, cumulative: bool = False, chains: int = 4,
                    executor: Any = None, progress: Callable[[int, int], None] | None = None,
                    analysis: RepeatedMeasuresAnalysis | None = None,
                    covariate_effects: str = "by_visit") -> ImputationDraws:
    """Run the chains (through ``executor.map`` when given) and gather their analyses.

    The complete-data df ν_com for Barnard–Rubin is the mean over imputations of each
    analysis's df (constant n − p for ANCOVA; a model-based df can vary slightly)."""
    _check_settings(data, assumption, n_imputations, burn_in, thinning, chains, covariance_by_arm)
    if covariate_effects not in COVARIATE_EFFECTS:
        raise ModelSpecificationError("unknown kind of covariate effect", [
            Problem(code="stats.covariate_effects", message="covariate effects are by visit or common to all "
                    "visits", expected=", ".join(COVARIATE_EFFECTS), got=repr(covariate_effects))])
    if scenarios is None:
        scenarios = np.zeros((1, len(data.arms), len(data.visits)))
    # A copy, so that the caller's SeedSequence is not advanced: the same seed sequence
    # passed twice must give the same numbers twice.
    root = np.random.SeedSequence(seed_sequence.entropy, spawn_key=seed_sequence.spawn_key,
                                  pool_size=seed_sequence.pool_size)
    seeds = root.spawn(n_imputations)
    tasks = [ChainTask(data, assumption, covariance_by_arm, burn_in, thinning,
                       tuple(seeds[i] for i in part), np.asarray(scenarios, float), cumulative, analysis,
                       covariate_effects)
             for part in chain_split(n_imputations, chains)]
    outputs = _map(executor, run_chain, tasks, progress)
    estimates = np.concatenate([o.estimates for o in outputs]).transpose(1, 0, 2, 3)
    variances = np.concatenate([o.variances for o in outputs]).transpose(1, 0, 2, 3)
    diagnostics = _diagnostics(data, outputs, covariance_by_arm)
    complete_df = np.concatenate([o.complete_df for o in outputs]).mean(axis=0)
    return ImputationDraws(estimates, variances, complete_df, diagnostics)


def _map(executor, function, items, progress):
    if executor is None:
        results = []
        for done, item in enumerate(items, start=1):
            results.append(function(item))
            if progress is not None:
                progress(done, len(items))
        return results
    if progress is not None and getattr(executor, "reports_progress", False):
        return executor.map(function, items, progress=progress)
    results = executor.map(function, items)
    if progress is not None:
        progress(len(items), len(items))
    return list(results)


def _diagnostics(data: ImputationData, outputs: list[ChainOutput], by_arm: bool) -> dict[str, Any]:
    names = trace_names(data, by_arm)
    traces = [o.trace for o in outputs]
    after = data.after_event
    return {
        "chains": len(outputs),
        "draws_per_chain": [int(t.shape[0]) for t in traces],
        "lag1_autocorrelation": {name: lag1_autocorrelation([t[:, j] for t in traces])
                                 for j, name in enumerate(names)},
        "imputed_values": int(data.imputed.sum()),
        "imputed_after_event": int(after.sum()),
        "imputed_other": int((data.imputed & ~after).sum()),
        "participants": len(data.subjects),
    }


def lag1_autocorrelation(chains: Sequence[np.ndarray]) -> float | None:
    """Σ (xₜ − x̄)(xₜ₊₁ − x̄) / Σ (xₜ − x̄)² over pairs within chains, x̄ over all draws."""
    values = np.concatenate(chains)
    if values.size < 3:
        return None
    centre = values.mean()
    numerator = sum(float(np.sum((c[:-1] - centre) * (c[1:] - centre))) for c in chains)
    denominator = float(np.sum((values - centre) ** 2))
    return numerator / denominator if denominator > 0 else None


def _check_settings(data, assumption, n_imputations, burn_in, thinning, chains, by_arm) -> None:
    problems = []
    names = {assumption} if isinstance(assumption, str) else set(assumption)
    for name in sorted(names - set(ASSUMPTIONS), key=str):
        problems.append(Problem(code="stats.assumption", message="unknown imputation assumption",
                                expected=", ".join(IMPUTATION_ASSUMPTIONS), got=str(name)))
    for name, value, least in (("n_imputations", n_imputations, 2), ("burn_in", burn_in, 0),
                               ("thinning", thinning, 1), ("chains", chains, 1)):
        if int(value) != value or value < least:
            problems.append(Problem(code="stats.imputation_setting", message=f"{name} out of range",
                                    field=name, expected=f"an integer ≥ {least}", got=str(value)))
    problems += _identifiability(data, by_arm)
    if problems:
        raise ModelSpecificationError("the imputation cannot run with these settings", problems)


def _identifiability(data: ImputationData, by_arm: bool) -> list[Problem]:
    """Every arm needs observed values at every visit, and enough participants for Σ."""
    problems = []
    if len(data.arms) < 2:
        problems.append(Problem(code="stats.one_arm", message="the data hold one arm only: there is no "
                                "comparison to impute for", expected="the reference arm and at least one other",
                                got=", ".join(map(str, data.arms)) or "no arm"))
    t, p = len(data.visits), data.covariates.shape[1]
    for k, arm in enumerate(data.arms):
        rows = data.arm_index == k
        empty = [data.visits[j] for j in range(t) if not np.any(~np.isnan(data.outcome[rows, j]))]
        if empty:
            problems.append(Problem(code="stats.no_observed_values", message=f"arm {arm!r} has no observed "
                                    f"value at some visits", expected="observed values at every visit",
                                    got=", ".join(empty)))
    sizes = [int(np.sum(data.arm_index == k)) for k in range(len(data.arms))]
    needed = (1 + p + t) if by_arm else (len(data.arms) + p + t)
    smallest = min(sizes) if by_arm else sum(sizes)
    if smallest < needed:
        problems.append(Problem(code="stats.too_few_participants", message="too few participants for an "
                                "unstructured covariance", expected=f"at least {needed}", got=str(smallest)))
    return problems


# --------------------------------------------------------------------------- the public face
@dataclass(frozen=True)
class PooledDifference:
    arm: str
    visit: str
    pooled: PooledEstimate


@dataclass(frozen=True)
class MultipleImputationResult:
    assumption: str
    reference: str
    arms: tuple[str, ...]
    visits: tuple[str, ...]
    differences_by_visit: tuple[PooledDifference, ...]
    settings: dict[str, Any]
    diagnostics: dict[str, Any]
    complete_df: float          # the smallest complete-data df over the differences

    def differences(self) -> pd.DataFrame:
        rows = [(d.arm, self.reference, d.visit, d.pooled.estimate, d.pooled.std_error, d.pooled.df,
                 d.pooled.t, d.pooled.p, d.pooled.lower, d.pooled.upper) for d in self.differences_by_visit]
        return pd.DataFrame(rows, columns=["arm", "reference", "visit", "estimate", "se", "df", "t", "p",
                                           "lower", "upper"])

    def pooling(self) -> pd.DataFrame:
        rows = [(d.arm, d.visit, d.pooled.n_imputations, d.pooled.within_variance, d.pooled.between_variance,
                 d.pooled.total_variance, d.pooled.relative_increase, d.pooled.proportion_due_to_missing,
                 d.pooled.fraction_missing_information, d.pooled.relative_efficiency, d.pooled.complete_df)
                for d in self.differences_by_visit]
        return pd.DataFrame(rows, columns=[
            "arm", "visit", "imputations", "within_variance", "between_variance", "total_variance",
            "relative_increase", "proportion_due_to_missing", "fraction_missing_information",
            "relative_efficiency", "complete_df"])

    def to_dict(self) -> dict[str, Any]:
        return {
            "assumption": self.assumption, "reference": self.reference, "arms": list(self.arms),
            "visits": list(self.visits), "settings": dict(self.settings), "diagnostics": dict(self.diagnostics),
            "complete_df": self.complete_df,
            "differences": [{"arm": d.arm, "visit": d.visit, **d.pooled.to_dict()} for d in self.differences_by_visit],
        }


def delta_by_arm(arms: Sequence[str], visits: Sequence[str], delta, delta_arms: Sequence[str]) -> np.ndarray:
    """(K, T) δ table: the given per-visit (or scalar) δ in the named arms, zero elsewhere."""
    table = np.zeros((len(arms), len(visits)))
    if delta is None:
        return table
    values = np.broadcast_to(np.asarray(delta, dtype=float), (len(visits),))
    unknown = [a for a in delta_arms if a not in arms]
    if unknown:
        raise ModelSpecificationError("δ names an unknown arm", [
            Problem(code="stats.delta_arm", message="δ arms must be arms of the data",
                    expected=", ".join(arms), got=", ".join(map(str, unknown)))])
    for arm in delta_arms:
        table[list(arms).index(arm)] = values
    return table


def _analysis_model(name: str, options: Mapping[str, str] | None,
                    covariate_effects: str) -> RepeatedMeasuresAnalysis | None:
    if name == "ancova" and not options:
        return None
    if name == "mmrm":   # covariate effects as in the imputation model, so the two stay congenial
        return RepeatedMeasuresAnalysis(**{"covariates_by_visit": covariate_effects == "by_visit",
                                           **dict(options or {})})
    raise ModelSpecificationError("unknown analysis model for the completed data sets", [
        Problem(code="stats.analysis_model", message="completed data sets are analysed by ANCOVA at each visit "
                "or by the repeated-measures model", expected="ancova, or mmrm (with mmrm_options)",
                got=f"{name!r} with options {dict(options or {})}")])


def participants_by_assumption(data: ImputationData, assumption) -> dict[str, int]:
    """Participants with an intercurrent event, by the assumption their values follow after it."""
    event = data.deviation < len(data.visits)
    names = [rule.name for rule, hit in zip(participant_rules(data, assumption), event) if hit]
    return {name: names.count(name) for name in IMPUTATION_ASSUMPTIONS if name in names}


def impute(frame: pd.DataFrame, *, subject: str, arm: str, visit: str, outcome: str,
           visits: Sequence[str], reference: str, covariates: Sequence[str] = (),
           assumption: str = "mar", event: str | Mapping[Any, Any] | None = None,
           n_imputations: int = 100, burn_in: int = 200, thinning: int = 10,
           covariance_by_arm: bool = False, delta=None, delta_arms: Sequence[str] = (),
           delta_cumulative: bool = False, seed_sequence: np.random.SeedSequence | int = 0,
           chains: int = 4, executor: Any = None, confidence_level: float = 0.95,
           arms: Sequence[str] | None = None, analysis_model: str = "ancova",
           mmrm_options: Mapping[str, str] | None = None, covariate_effects: str = "by_visit",
           assumption_by_subject: Mapping[Any, str] | None = None,
           progress: Callable[[int, int], None] | None = None) -> MultipleImputationResult:
    """Multiple imputation, ANCOVA at every visit on each completed data set, Rubin's rules.

    ``event`` marks values missing after an intercurrent event (see :func:`prepare_data`);
    they follow ``assumption``, every other missing value is MAR.  ``delta`` (scalar or one
    value per visit) is added to imputed values of the ``delta_arms``.  The result depends
    on the seed, m and ``chains`` only, never on the executor.  ``analysis_model`` "mmrm"
    analyses each completed data set with ``fit_mmrm`` (``mmrm_options``: covariance, df,
    method) instead of ANCOVA at each visit.  ``assumption_by_subject`` (participant ->
    assumption name) overrides ``assumption`` for the participants it names, e.g. jump to
    reference after discontinuation for lack of efficacy and MAR for other reasons.
    """
    analysis = _analysis_model(analysis_model, mmrm_options, covariate_effects)
    data = prepare_data(frame, subject=subject, arm=arm, visit=visit, outcome=outcome, visits=visits,
                        reference=reference, covariates=covariates, event=event, arms=arms)
    seeds = seed_sequence if isinstance(seed_sequence, np.random.SeedSequence) else np.random.SeedSequence(seed_sequence)
    scenario = delta_by_arm(data.arms, data.visits, delta, delta_arms)[None]
    rules = assumption if not assumption_by_subject else tuple(
        str(assumption_by_subject.get(s, assumption)) for s in data.subjects)
    draws = run_imputations(data, assumption=rules, n_imputations=n_imputations, burn_in=burn_in,
                            thinning=thinning, covariance_by_arm=covariance_by_arm, seed_sequence=seeds,
                            scenarios=scenario, cumulative=delta_cumulative, chains=chains,
                            executor=executor, progress=progress, analysis=analysis,
                            covariate_effects=covariate_effects)
    pooled = tuple(
        PooledDifference(data.arms[k + 1], data.visits[j],
                         rubin_pool(draws.estimates[0, :, k, j], draws.variances[0, :, k, j],
                                    complete_df=float(draws.complete_df[0, k, j]), confidence_level=confidence_level))
        for k in range(len(data.arms) - 1) for j in range(len(data.visits)))
    settings = {"n_imputations": n_imputations, "burn_in": burn_in, "thinning": thinning, "chains": chains,
                "covariance_by_arm": covariance_by_arm, "covariates": list(data.covariate_names),
                "covariate_effects": covariate_effects, "delta": None if delta is None else np.broadcast_to(np.asarray(delta, float), (len(data.visits),)).tolist(),
                "delta_arms": list(delta_arms), "delta_cumulative": delta_cumulative,
                "participants_by_assumption": participants_by_assumption(data, rules),
                "analysis": "ancova at each visit" if analysis is None else f"mmrm ({analysis.covariance}, "
                f"{analysis.method}, df {analysis.df})", "confidence_level": confidence_level}
    return MultipleImputationResult(assumption, reference, data.arms, data.visits, pooled, settings,
                                    draws.diagnostics, float(draws.complete_df.min()))
