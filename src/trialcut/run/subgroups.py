"""Subgroup analyses: each endpoint's primary analysis within each level of each plan-declared factor.

For every level the primary analysis is run again on the participants of that level (its
other settings unchanged, except that the factor itself is dropped from the covariates and
strata, where it no longer varies).  A level with fewer than ``min_participants`` in any arm
is reported with its counts and not fitted.

Treatment-by-subgroup interaction: the levels hold different participants, so their estimates
are independent, and the Wald test that the effect is the same in every level is
``Q = sum_l w_l (theta_l - theta_bar)^2`` with ``w_l = 1 / se_l^2`` and ``theta_bar`` the
weighted mean, referred to chi-square on L - 1 degrees of freedom (Cochran 1954, Biometrics
10:101-129; the same as the interaction test of a model with the factor fully crossed with
everything).  Ratios are compared on the log scale.  Subgroup results are exploratory unless
prespecified with control of error; the results carry that caution.
"""
from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from trialcut.data.derive_responder import derive_outcome
from trialcut.errors import FitError, ModelSpecificationError
from trialcut.run.tables import table

CAUTION = ("Subgroup results are exploratory unless the subgroups were prespecified with control of the "
           "overall error rate; a difference between subgroups can arise by chance, and an effect within a small "
           "subgroup is estimated imprecisely.")
RATIO_EFFECTS = ("risk_ratio", "odds_ratio", "rate_ratio")
LEVEL_COLUMNS = ("level", "arm", "reference", "n_arm", "n_reference", "status", "estimate", "se", "lower", "upper",
                 "p", "note")
INTERACTION_COLUMNS = ("arm", "test", "statistic", "num_df", "p", "levels_fitted")


def subgroup_results(plan, cut, endpoint, context, methods, population: str) -> list[dict[str, Any]]:
    """One entry per subgroup factor of the plan, for the endpoint's primary analysis."""
    if not getattr(plan, "subgroups", ()):
        return []
    primary = endpoint.analyses.primary
    data = cut.analysis_data(endpoint.id, estimand_id=primary.estimand, population_id=population)
    data = derive_outcome(endpoint, data, source=str(cut.manifest.get("file", "the data cut"))).due_only()
    # A level's fit is read for its differences only: the method may leave out residuals and the
    # other tables (the same fit, the same differences).
    context = replace(context, estimates_only=True)
    return [_one_factor(factor, data, primary, endpoint, context, methods) for factor in plan.subgroups]


def _one_factor(factor, data, primary, endpoint, context, methods) -> dict[str, Any]:
    entry: dict[str, Any] = {"id": factor.id, "label": factor.label, "column": factor.column,
                             "analysis": primary.id, "caution": CAUTION, "notes": []}
    if factor.column not in data.frame.columns:
        entry["notes"].append(f"column {factor.column!r} is not in the data: no subgroup analysis")
        entry["levels"] = table(pd.DataFrame(columns=LEVEL_COLUMNS), f"Effect within each level of {factor.label}")
        entry["interaction"] = table(pd.DataFrame(columns=INTERACTION_COLUMNS), "Test of equal effects across levels")
        return entry
    analysis = _without_factor(primary, factor.column)
    rows = []
    for level in factor.levels:
        rows += _level_rows(level, factor, data, analysis, endpoint, context, methods, entry["notes"])
    levels = pd.DataFrame(rows, columns=LEVEL_COLUMNS)
    entry["levels"] = table(levels, f"{endpoint.label}: effect within each level of {factor.label} "
                                    f"({primary.label}, at {endpoint.primary_visit})")
    entry["interaction"] = table(_interaction(levels, _effect(primary, endpoint)),
                                 f"Test of equal effects across the levels of {factor.label} "
                                 "(treatment-by-subgroup interaction)")
    return entry


def _without_factor(analysis, column: str):
    options = analysis.options
    update = {name: tuple(c for c in getattr(options, name) if c != column)
              for name in ("covariates", "covariates_by_visit", "strata") if hasattr(options, name)}
    return analysis.model_copy(update={"options": options.model_copy(update=update)})


def _level_rows(level, factor, data, analysis, endpoint, context, methods, notes) -> list[tuple]:
    frame = data.frame
    inside = frame[frame[factor.column].astype(str) == str(level)]
    counts = inside.groupby(data.arm)[data.subject].nunique()
    n = {arm: int(counts.get(arm, 0)) for arm in data.arms}
    others = [arm for arm in data.arms if arm != data.reference]
    if min(n.values()) < factor.min_participants:
        reason = (f"fewer than {factor.min_participants} participants in an arm "
                  f"({', '.join(f'{a}: {n[a]}' for a in data.arms)}); reported, not fitted")
        notes.append(f"{factor.label} = {level}: {reason}")
        return [(level, arm, data.reference, n[arm], n[data.reference], "not_fitted", *([math.nan] * 5), reason)
                for arm in others]
    subset = _replace_frame(data, inside.reset_index(drop=True))
    try:
        result = methods[analysis.method](subset, analysis, context)
    except (FitError, ModelSpecificationError) as error:
        reason = str(error).splitlines()[0]
        notes.append(f"{factor.label} = {level}: the analysis failed ({reason})")
        return [(level, arm, data.reference, n[arm], n[data.reference], "failed", *([math.nan] * 5), reason)
                for arm in others]
    differences = pd.DataFrame(result["tables"]["differences"]["data"],
                               columns=result["tables"]["differences"]["columns"])
    at_visit = differences[differences["visit"].isin([endpoint.primary_visit, "Whole period"])]
    rows = []
    for arm in others:
        row = at_visit[at_visit["arm"] == arm]
        if row.empty:
            rows.append((level, arm, data.reference, n[arm], n[data.reference], "failed", *([math.nan] * 5),
                         "no estimate at the primary visit"))
            continue
        r = row.iloc[0]
        rows.append((level, arm, data.reference, n[arm], n[data.reference], "ok", r["estimate"], r["se"],
                     r["lower"], r["upper"], r["p"], ""))
    return rows


def _replace_frame(data, frame):
    return replace(data, frame=frame)


def _effect(analysis, endpoint) -> str:
    effect = getattr(analysis.options, "effect", None)
    if effect:
        return effect
    return {"binary": "risk_difference", "count": "rate_ratio"}.get(endpoint.type, "difference")


def _interaction(levels: pd.DataFrame, effect: str) -> pd.DataFrame:
    rows = []
    for arm, group in levels[levels["status"] == "ok"].groupby("arm", sort=False):
        estimates = group["estimate"].to_numpy(float)
        if effect in RATIO_EFFECTS:
            estimates = np.log(estimates)
        se = group["se"].to_numpy(float)
        usable = np.isfinite(estimates) & np.isfinite(se) & (se > 0)
        if usable.sum() < 2:
            rows.append((arm, "equal_effects", math.nan, int(usable.sum()) - 1, math.nan, int(usable.sum())))
            continue
        weights = 1 / se[usable] ** 2
        pooled = float(np.sum(weights * estimates[usable]) / weights.sum())
        statistic = float(np.sum(weights * (estimates[usable] - pooled) ** 2))
        num_df = int(usable.sum()) - 1
        rows.append((arm, "equal_effects", statistic, num_df, float(stats.chi2.sf(statistic, num_df)),
                     int(usable.sum())))
    return pd.DataFrame(rows, columns=INTERACTION_COLUMNS)
