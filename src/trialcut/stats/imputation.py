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

Modules, one job each (this one is the public entry point and re-exports their names):
    imputation_assumptions  MAR, J2R, CR, CIR: m* and Σ* of an affected participant
    imputation_data         the long frame turned into the sampler's arrays
    imputation_sampler      data augmentation (I-step, P-step) and one completed data set
    imputation_analysis     δ shifts and the analysis of each completed data set
    imputation_chains       chains, burn-in, seeds, diagnostics and setting checks
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.imputation_analysis import AncovaCore, RepeatedMeasuresAnalysis, VisitAncova, shift_matrix
from trialcut.stats.imputation_assumptions import (
    ASSUMPTIONS, Assumption, CopyIncrementsInReference, CopyReference, JumpToReference, MissingAtRandom,
    participant_rules, reference_based_covariance,
)
from trialcut.stats.imputation_chains import (
    COVARIATE_EFFECTS, ChainOutput, ChainTask, ImputationDraws, chain_split, lag1_autocorrelation, run_chain,
    run_imputations, trace_names,
)
from trialcut.stats.imputation_data import ImputationData, prepare_data
from trialcut.stats.imputation_sampler import (
    ModelParameters, _BatchedConditional, _CommonSlopeSampler, _inverse_wishart, draw_completed,
    imputation_steps,
)
from trialcut.stats.names import IMPUTATION_ASSUMPTIONS
from trialcut.stats.pooling import PooledEstimate, rubin_pool

__all__ = [
    "ASSUMPTIONS", "COVARIATE_EFFECTS", "AncovaCore", "Assumption", "ChainOutput", "ChainTask",
    "CopyIncrementsInReference", "CopyReference", "ImputationData", "ImputationDraws", "JumpToReference",
    "MissingAtRandom", "ModelParameters", "MultipleImputationResult", "PooledDifference",
    "RepeatedMeasuresAnalysis", "VisitAncova", "chain_split", "delta_by_arm", "draw_completed",
    "imputation_steps", "impute", "lag1_autocorrelation", "participant_rules", "participants_by_assumption",
    "prepare_data", "reference_based_covariance", "run_chain", "run_imputations", "shift_matrix", "trace_names",
]

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
