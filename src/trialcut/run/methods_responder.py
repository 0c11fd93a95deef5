"""Analysis methods for binary and count endpoints: ``gee``, ``rate`` and ``proportions``.

Each receives the endpoint's derived analysis data (:mod:`trialcut.data.derive_responder`)
and returns ``tables`` (always ``differences`` with the shared columns ``arm, reference, visit,
estimate, se, df, t, p, lower, upper``, plus ``effect``), ``fit`` and ``diagnostics``.  The
statistics are normal-theory: ``df`` is empty and ``t`` holds the z statistic.  For a ratio,
``estimate``, ``lower`` and ``upper`` are ratios and ``se`` is the standard error of the log ratio.

Separation in a GEE of a binary endpoint (an arm with no responders, or only responders, at a
visit) falls back to the per-visit unadjusted risk difference with Newcombe's hybrid score
interval, recorded in the fit's notes.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from trialcut.errors import FitError
from trialcut.run.context import RunContext
from trialcut.run.tables import plain, table

SHARED_COLUMNS = ("arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper", "effect")


def _shared(frame: pd.DataFrame, visit: Any = None) -> pd.DataFrame:
    frame = frame.rename(columns={"z": "t"}).assign(df=np.nan)
    if "visit" not in frame.columns:
        frame = frame.assign(visit=visit)
    return frame[list(SHARED_COLUMNS)]


def observed_rates(data) -> pd.DataFrame:
    """Responders (or events and exposure) by arm and visit, over the values analysed."""
    frame = data.frame[data.frame[data.outcome].notna()]
    rows = []
    for arm in data.arms:
        for visit in data.visits:
            cell = frame[(frame[data.arm] == arm) & (frame[data.visit] == visit)]
            n = int(cell[data.subject].nunique())
            if data.endpoint_type == "binary":
                responders = int(cell[data.outcome].sum())
                rows.append((arm, visit, n, responders, responders / n if n else np.nan))
            else:
                events = float(cell[data.outcome].sum())
                exposure = float(cell[data.exposure].sum()) if data.exposure else float(n)
                rows.append((arm, visit, n, events, exposure, events / exposure if exposure else np.nan))
    if data.endpoint_type == "binary":
        return pd.DataFrame(rows, columns=["arm", "visit", "n", "responders", "proportion"])
    return pd.DataFrame(rows, columns=["arm", "visit", "n", "events", "exposure", "rate"])


def _rates_title(data) -> str:
    if data.endpoint_type == "binary":
        return "Responders by arm and visit (values analysed)"
    return "Events, exposure and crude rate by arm and visit (values analysed)"


def run_gee(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.stats.gee import fit_gee

    options = analysis.options
    binary = data.endpoint_type == "binary"
    family = options.family or ("binomial" if binary else "negative_binomial")
    effect = options.effect or ("risk_difference" if binary else "rate_ratio")
    level = options.confidence_level
    try:
        fit = fit_gee(data.frame, outcome=data.outcome, subject=data.subject, visit=data.visit, arm=data.arm,
                      reference=data.reference, visits=list(data.visits), covariates=tuple(options.covariates),
                      family=family, correlation=options.correlation,
                      offset=None if binary else data.log_exposure, small_sample=options.small_sample)
    except FitError as error:
        if not (binary and error.problems and error.problems[0].code == "gee.separation"):
            raise
        return _separation_fallback(data, error, level)
    scale = "proportion" if binary else "rate per unit of exposure"
    tables = {
        "differences": table(_shared(fit.differences(effect, level)),
                             f"{_effect_words(effect)} by visit (standardised over the participants' covariates)"),
        "marginal_means": table(fit.marginal_means(level), f"Standardised {scale} by arm and visit"),
        "observed_rates": table(observed_rates(data), _rates_title(data)),
        "joint_tests": table(fit.joint_tests(), "Tests of each effect, all its coefficients at once (Wald)"),
        "coefficients": table(fit.coefficients, "Estimated coefficients (log odds or log rate scale)"),
    }
    record = plain(fit.to_dict(level))
    summary = {k: v for k, v in record.items() if not isinstance(v, dict) and k not in ("term_keys",)}
    return {"tables": tables, "fit": summary | {"effect": effect, "missing_rule": data.missing_rule},
            "diagnostics": {}}


def _separation_fallback(data, error: FitError, level: float) -> dict[str, Any]:
    from trialcut.stats.proportions import compare_proportions

    rows = []
    for visit in data.visits:
        at_visit = data.frame[(data.frame[data.visit] == visit) & data.frame[data.outcome].notna()]
        if at_visit.empty:
            continue
        comparison = compare_proportions(at_visit, outcome=data.outcome, arm=data.arm, reference=data.reference,
                                         confidence_level=level)
        frame = comparison.differences()
        rows.append(frame[frame["method"] == "unadjusted"].assign(visit=visit))
    differences = _shared(pd.concat(rows, ignore_index=True)) if rows else pd.DataFrame(columns=SHARED_COLUMNS)
    note = (f"{error} — the GEE was not fitted; each visit's risk difference is the unadjusted one with "
            "Newcombe's hybrid score interval (Newcombe 1998)")
    return {"tables": {"differences": table(differences, "Risk difference by visit (unadjusted; separation fallback)"),
                       "observed_rates": table(observed_rates(data), _rates_title(data))},
            "fit": {"fallback": "newcombe_hybrid_score", "notes": [note], "missing_rule": data.missing_rule},
            "diagnostics": {}}


def run_rate(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.stats.rates import fit_rate

    options = analysis.options
    frame = data.frame[data.frame[data.outcome].notna()]
    per_participant = frame.groupby(data.subject, sort=True).agg(
        **{data.outcome: (data.outcome, "sum"), data.arm: (data.arm, "first"),
           **{c: (c, "first") for c in options.covariates}},
        **({"exposure_total": (data.exposure, "sum")} if data.exposure else {})).reset_index()
    fit = fit_rate(per_participant, outcome=data.outcome, arm=data.arm, reference=data.reference,
                   covariates=tuple(options.covariates), exposure="exposure_total" if data.exposure else None,
                   family=options.family)
    level = options.confidence_level
    tables = {
        # Labelled with the primary visit, the end of the period, so that multiplicity hypotheses and
        # the side-by-side summaries find it as they find any other endpoint's primary estimate.
        "differences": table(_shared(fit.differences(options.effect, level), visit=data.primary_visit),
                             f"{_effect_words(options.effect)} over the whole period up to {data.primary_visit}"),
        "rates": table(fit.rates(level), "Standardised event rate per unit of exposure by arm"),
        "summary": table(fit.summary(), "Participants, events and exposure by arm (whole period)"),
        "observed_rates": table(observed_rates(data), _rates_title(data)),
    }
    record = plain(fit.to_dict(level))
    summary = {k: v for k, v in record.items() if not isinstance(v, dict)}
    return {"tables": tables, "fit": summary | {"effect": options.effect}, "diagnostics": {}}


def run_proportions(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.stats.proportions import compare_proportions

    options = analysis.options
    visits = {"all": list(data.visits), "primary": [data.primary_visit]}.get(options.visits, options.visits)
    shared, methods, tests, counts, notes = [], [], [], [], []
    for visit in visits:
        at_visit = data.frame[(data.frame[data.visit] == visit) & data.frame[data.outcome].notna()]
        comparison = compare_proportions(at_visit, outcome=data.outcome, arm=data.arm, reference=data.reference,
                                         strata=tuple(options.strata), covariates=tuple(options.covariates),
                                         confidence_level=options.confidence_level)
        frame = comparison.differences().assign(visit=visit)
        main = frame[frame["method"].isin(["standardised", "unadjusted_fallback"])]
        shared.append(_shared(main))
        methods.append(frame)
        tests.append(comparison.tests().assign(visit=visit))
        counts.append(comparison.counts().assign(visit=visit))
        notes += [f"{visit}: {note}" for note in comparison.notes]
    return {
        "tables": {
            "differences": table(pd.concat(shared, ignore_index=True),
                                 "Risk difference, adjusted and standardised over the participants' covariates"),
            "methods": table(pd.concat(methods, ignore_index=True),
                             "Risk difference and odds ratio by method (unadjusted, stratified, standardised)"),
            "tests": table(pd.concat(tests, ignore_index=True), "Stratified test of no difference"),
            "observed_rates": table(pd.concat(counts, ignore_index=True), "Responders by arm and visit"),
        },
        "fit": {"strata": ", ".join(options.strata) or "none", "covariates": ", ".join(options.covariates) or "none",
                "notes": notes, "missing_rule": data.missing_rule},
        "diagnostics": {},
    }


def _effect_words(effect: str) -> str:
    return {"risk_difference": "Risk difference", "risk_ratio": "Risk ratio", "odds_ratio": "Odds ratio",
            "rate_ratio": "Rate ratio", "rate_difference": "Rate difference"}[effect]


def run_responder_imputation(data, analysis, context: RunContext) -> dict[str, Any]:
    """Impute the continuous score (values after an intercurrent event follow the plan's
    assumption, every other missing value MAR), then count responders by the threshold."""
    from trialcut.stats.responder_imputation import impute_responders

    options = analysis.options
    frame = data.frame
    after_event = frame["intercurrent_event"].notna() if "intercurrent_event" in frame.columns else False
    if "outcome_set_missing" in frame.columns:
        after_event = after_event | frame["outcome_set_missing"].fillna(False).astype(bool)
    differences = impute_responders(
        frame.assign(_after_event=after_event), subject=data.subject, arm=data.arm, visit=data.visit,
        outcome=data.score, visits=list(data.visits), reference=data.reference, arms=list(data.arms),
        threshold=data.threshold, direction=data.direction, covariates=tuple(options.covariates),
        assumption=options.assumption, event="_after_event", n_imputations=options.imputations,
        burn_in=options.burn_in, thinning=options.thinning, chains=options.chains,
        seed_sequence=context.seed_sequence(analysis.id), confidence_level=options.confidence_level)
    return {"tables": {"differences": table(_shared(differences.rename(columns={"t": "z"}).assign(
                           effect="risk_difference")).assign(df=differences["df"]),
                       f"Risk difference by visit, pooled over {options.imputations} imputations of the score "
                       "(Rubin's rules on the difference scale)")},
            "fit": {"assumption": options.assumption, "imputations": options.imputations,
                    "covariates": ", ".join(options.covariates) or "none", "score": data.score,
                    "threshold": data.threshold, "direction": data.direction,
                    "pooling_scale": "risk difference"},
            "diagnostics": {}}
