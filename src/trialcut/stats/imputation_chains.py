"""Chains, burn-in and seeds: the m imputations run reproducibly on any executor.

Data augmentation (Schafer 1997, Analysis of Incomplete Multivariate Data, ch. 5–6) is split into
``chains`` independent chains, each with its own burn-in, a split that depends only on m and
``chains``, never on the executor.  Imputation k draws every random number it needs (its share of
the chain's iterations and its own imputation) from the k-th child of the root SeedSequence, so
results are identical for any executor and worker count.  Each chain also analyses its completed
data sets, so only small arrays travel back; the settings are checked here before any chain runs.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.imputation_analysis import RepeatedMeasuresAnalysis, VisitAncova, shift_matrix
from trialcut.stats.imputation_assumptions import ASSUMPTIONS
from trialcut.stats.imputation_data import ImputationData
from trialcut.stats.imputation_sampler import (
    ModelParameters, _CommonSlopeSampler, _Sampler, draw_completed, imputation_steps,
)
from trialcut.stats.names import IMPUTATION_ASSUMPTIONS


COVARIATE_EFFECTS = ("by_visit", "common")

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
