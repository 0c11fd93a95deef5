"""Missing-data sensitivity analyses of a plan: multiple imputation and the tipping-point grid.

The data layer has already applied the estimand: values after an event handled by the
hypothetical strategy are missing (``outcome_set_missing``), composite values are filled
in.  A missing value on a row that carries an ``intercurrent_event`` follows the plan's
imputation assumption; every other missing value is imputed under MAR.  Random numbers
come from ``context.seed_sequence(analysis.id)``, work goes to ``context.executor``.
"""
from __future__ import annotations

from typing import Any

from trialcut.run.assumption_rules import participant_assumptions
from trialcut.run.context import RunContext
from trialcut.run.tables import plain, table
from trialcut.stats.imputation import impute
from trialcut.stats.tipping import tipping_point

EVENT_FLAG = "_after_intercurrent_event"


def _frame_with_event_flag(data) -> Any:
    frame = data.frame
    flag = frame["intercurrent_event"].notna() if "intercurrent_event" in frame.columns else False
    if "outcome_set_missing" in frame.columns:
        flag = flag | frame["outcome_set_missing"].fillna(False).astype(bool)
    return frame.assign(**{EVENT_FLAG: flag})


def _roles(data) -> dict[str, Any]:
    return dict(subject=data.subject, arm=data.arm, visit=data.visit, outcome=data.outcome,
                visits=list(data.visits), reference=data.reference, arms=list(data.arms))


def _progress(context: RunContext, label: str):
    if context.progress is None:
        return None
    return lambda done, total: context.progress(label, done, total)


def _entry(tables: dict[str, Any], fit: dict[str, Any]) -> dict[str, Any]:
    """What a method contributes; identity, options and status are the runner's."""
    return {"tables": tables, "fit": plain(fit), "diagnostics": {}}


def run_multiple_imputation(data, analysis, context: RunContext) -> dict[str, Any]:
    options = analysis.options
    by_participant, rule_facts = participant_assumptions(data, options)
    result = impute(
        _frame_with_event_flag(data), **_roles(data), covariates=tuple(options.covariates),
        assumption=options.assumption, event=EVENT_FLAG, n_imputations=options.imputations,
        burn_in=options.burn_in, thinning=options.thinning, covariance_by_arm=options.covariance_by_arm,
        chains=options.chains, delta=options.delta, delta_arms=tuple(options.delta_arms), delta_cumulative=options.delta_cumulative,
        seed_sequence=context.seed_sequence(analysis.id), executor=context.executor,
        confidence_level=options.confidence_level, progress=_progress(context, analysis.id),
        analysis_model=options.analysis_model, covariate_effects=options.covariate_effects,
        assumption_by_subject=by_participant,
    )
    tables = {
        "differences": table(result.differences(), f"Differences from the reference arm, pooled over "
                             f"{options.imputations} imputations ({_assumption_words(options.assumption)})"),
        "pooling": table(result.pooling(), "Between- and within-imputation variance"),
    }
    fit = {"assumption": options.assumption, "imputations": options.imputations, "burn_in": options.burn_in,
           "thinning": options.thinning, "chains": result.settings["chains"], "complete_df": result.complete_df,
           "covariates": result.settings["covariates"], "diagnostics": result.diagnostics,
           "delta": result.settings["delta"], "delta_arms": result.settings["delta_arms"],
           **_model_facts(options, result.settings, rule_facts)}
    return _entry(tables, fit)


def run_tipping_point(data, analysis, context: RunContext) -> dict[str, Any]:
    options = analysis.options
    by_participant, rule_facts = participant_assumptions(data, options)
    result = tipping_point(
        _frame_with_event_flag(data), **_roles(data), target_visit=data.primary_visit,
        shifts=options.shifts, reference_shifts=options.reference_shifts, covariates=tuple(options.covariates),
        event=EVENT_FLAG, assumption=options.assumption, n_imputations=options.imputations,
        burn_in=options.burn_in, thinning=options.thinning, alpha=options.alpha,
        chains=options.chains, covariance_by_arm=options.covariance_by_arm,
        seed_sequence=context.seed_sequence(analysis.id), executor=context.executor,
        progress=_progress(context, analysis.id), covariate_effects=options.covariate_effects,
        assumption_by_subject=by_participant,
    )
    tables = {
        "differences": table(result.differences(), "Differences from the reference arm with no shift "
                             f"({_assumption_words(options.assumption)})"),
        # Monte Carlo standard error of each pooled estimate, √(B/m): the report states how far
        # the finite number of imputations can move the tipping point.
        "tipping_grid": table(result.grid().assign(monte_carlo_se=[
                                  (c.pooled.between_variance / c.pooled.n_imputations) ** 0.5 for c in result.cells]),
                              f"Pooled difference at {data.primary_visit} for each shift of the imputed values"),
        "tipping_points": table(result.tipping_points(), "Shift at which the conclusion changes"),
    }
    fit = {"assumption": options.assumption, "imputations": options.imputations, "burn_in": options.burn_in,
           "thinning": options.thinning, "chains": result.settings["chains"], "alpha": options.alpha,
           "visit": data.primary_visit, "shifts": result.settings["shifts"],
           "reference_shifts": result.settings["reference_shifts"], "diagnostics": result.diagnostics,
           **_model_facts(options, result.settings, rule_facts)}
    return _entry(tables, fit)


def _model_facts(options, settings: dict[str, Any], rule_facts: dict[str, Any]) -> dict[str, Any]:
    """How the imputation model treats covariates, and which assumption each participant got."""
    effect = "by visit" if options.covariate_effects == "by_visit" else "common to all visits"
    facts: dict[str, Any] = {
        "covariate_effects": options.covariate_effects,
        "imputation_covariate_structure": ", ".join(f"{name} ({effect})" for name in options.covariates)
                                          or "no covariates"}
    if rule_facts:
        facts["assumption_rules"] = rule_facts
        facts["participants_by_assumption"] = settings.get("participants_by_assumption")
    return facts


def _assumption_words(name: str) -> str:
    return {"mar": "missing at random", "jump_to_reference": "jump to reference",
            "copy_reference": "copy reference",
            "copy_increments_in_reference": "copy increments in reference"}[name]

