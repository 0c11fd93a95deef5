"""Responders after multiple imputation of the underlying continuous score.

The continuous score (e.g. the change from baseline) is imputed by the existing engine
(:mod:`trialcut.stats.imputation`: the same sampler, the same reference-based assumptions, the
same chains and seeds); each completed data set is then dichotomised by the threshold and the
risk difference of each arm against the reference is computed at each visit over the
participants whose visit was due, with its unpooled binomial variance
``p1 (1 - p1) / n1 + p0 (1 - p0) / n0``.  The m differences are pooled with Rubin's rules
(Rubin 1987) **on the risk-difference scale**, with complete-data degrees of freedom
``n1 + n0 - 2``; on that scale the pooled interval can reach past -1 or 1 when a proportion
is near 0 or 1, which the result's notes then say.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem
from trialcut.stats.imputation import delta_by_arm, prepare_data, run_imputations
from trialcut.stats.pooling import rubin_pool

DIRECTIONS = ("at_most", "at_least")
COLUMNS = ("arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper")


@dataclass(frozen=True)
class DichotomisedAnalysis:
    """Analysis of one completed data set: responders by threshold, risk difference per visit."""

    threshold: float
    direction: str

    def analyse(self, data, completed: np.ndarray, shifts: np.ndarray):
        n_arms, n_visits = len(data.arms), len(data.visits)
        shape = (shifts.shape[0], n_arms - 1, n_visits)
        estimate, variance, df = np.empty(shape), np.empty(shape), np.empty(shape)
        due = data.due
        for s, shift in enumerate(shifts):
            values = completed + shift
            response = values <= self.threshold if self.direction == "at_most" else values >= self.threshold
            for t in range(n_visits):
                p0, n0 = _proportion(response[:, t], due[:, t] & (data.arm_index == 0))
                for k in range(1, n_arms):
                    p1, n1 = _proportion(response[:, t], due[:, t] & (data.arm_index == k))
                    estimate[s, k - 1, t] = p1 - p0
                    variance[s, k - 1, t] = p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0
                    df[s, k - 1, t] = n1 + n0 - 2
        return estimate, variance, df


def _proportion(response: np.ndarray, members: np.ndarray) -> tuple[float, int]:
    count = int(members.sum())
    if count == 0:
        raise ModelSpecificationError("an arm has no participant due at a visit", [
            Problem("stats.responder_imputation_empty", "no participant of an arm was due at a visit",
                    hint="leave that visit out of the analysis")])
    return float(response[members].mean()), count


def impute_responders(frame: pd.DataFrame, *, subject: str, arm: str, visit: str, outcome: str,
                      visits: Sequence[str], reference: str, threshold: float, direction: str,
                      covariates: Sequence[str] = (), assumption: str = "mar", event=None,
                      n_imputations: int = 50, burn_in: int = 200, thinning: int = 10, chains: int = 4,
                      seed_sequence: np.random.SeedSequence | int = 0, confidence_level: float = 0.95,
                      arms: Sequence[str] | None = None) -> pd.DataFrame:
    """Risk differences per arm and visit, pooled over imputations of the continuous score."""
    if direction not in DIRECTIONS:
        raise ModelSpecificationError("direction must be at_most or at_least", [
            Problem("stats.direction", "unknown direction", field="direction", expected=" or ".join(DIRECTIONS),
                    got=repr(direction))])
    data = prepare_data(frame, subject=subject, arm=arm, visit=visit, outcome=outcome, visits=visits,
                        reference=reference, covariates=covariates, event=event, arms=arms)
    seeds = seed_sequence if isinstance(seed_sequence, np.random.SeedSequence) else np.random.SeedSequence(seed_sequence)
    draws = run_imputations(data, assumption=assumption, n_imputations=n_imputations, burn_in=burn_in,
                            thinning=thinning, covariance_by_arm=False, seed_sequence=seeds,
                            scenarios=delta_by_arm(data.arms, data.visits, None, ())[None], chains=chains,
                            analysis=DichotomisedAnalysis(float(threshold), direction))
    rows = []
    for k, arm_name in enumerate(data.arms[1:]):
        for t, visit_name in enumerate(data.visits):
            pooled = rubin_pool(draws.estimates[0, :, k, t], draws.variances[0, :, k, t],
                                complete_df=float(draws.complete_df[0, k, t]), confidence_level=confidence_level)
            rows.append(_row(arm_name, data.arms[0], visit_name, pooled))
    return pd.DataFrame(rows, columns=COLUMNS)


def _row(arm: Any, reference: Any, visit: Any, pooled) -> tuple:
    record = pooled.to_dict() if hasattr(pooled, "to_dict") else vars(pooled)
    pick = lambda *names: next((record[n] for n in names if n in record), np.nan)   # noqa: E731
    return (arm, reference, visit, pick("estimate"), pick("se", "std_error"), pick("df"), pick("t"),
            pick("p"), pick("lower"), pick("upper"))
