"""Guard-rails between a plan's analyses and its estimands (ICH E9(R1) and its addendum's words).

Each analysis has a role: *primary*; *sensitivity* — the primary estimand under other
assumptions about missing data; *supplementary* — another estimand or another population.
A finding here is a warning, not an error: ``trialcut check`` prints it with its place in the
plan, and ``trialcut run`` records it in the results and the audit record.  Findings:

- a sensitivity analysis that analyses another population or another estimand;
- a multiple-imputation analysis that imputes the values after an event handled by the
  hypothetical strategy under a reference-based assumption (which describes what happened
  after the event, a treatment-policy view, not the hypothetical one);
- an imputation model that is not congenial with the primary analysis (Meng 1994,
  Statistical Science 9:538–558): fewer covariates, or covariate effects structured otherwise
  (each covariate's own effect at each visit against one effect common to all visits).
"""
from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Iterator

REFERENCE_BASED = ("jump_to_reference", "copy_reference", "copy_increments_in_reference")
IMPUTATION_METHODS = ("multiple_imputation", "tipping_point")
ASSUMPTION_WORDS = {"mar": "missing at random", "jump_to_reference": "jump to reference",
                    "copy_reference": "copy reference", "copy_increments_in_reference": "copy increments in reference"}


@dataclass(frozen=True)
class Finding:
    code: str
    analysis: str
    field: str          # breadcrumb into the plan, e.g. endpoints[fbs_change].analyses.sensitivity[pp].population
    message: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def analysis_population(plan, analysis) -> str | None:
    if analysis.population is not None:
        return analysis.population
    return plan.estimand(analysis.estimand).population if analysis.estimand else None


def role_of(plan, endpoint, analysis) -> str:
    """The declared role, else: primary in the primary slot; sensitivity when the estimand and
    population are the primary analysis'; supplementary otherwise."""
    if analysis.role is not None:
        return analysis.role
    primary = endpoint.analyses.primary
    if analysis is primary:
        return "primary"
    same = (analysis.estimand == primary.estimand
            and analysis_population(plan, analysis) == analysis_population(plan, primary))
    return "sensitivity" if same else "supplementary"


def _where(endpoint, analysis) -> str:
    if analysis is endpoint.analyses.primary:
        return f"endpoints[{endpoint.id}].analyses.primary"
    return f"endpoints[{endpoint.id}].analyses.sensitivity[{analysis.id}]"


def findings(plan) -> list[Finding]:
    """Every guard-rail warning of the plan, in plan order."""
    out: list[Finding] = []
    for endpoint in plan.endpoints:
        primary = endpoint.analyses.primary
        for analysis in (primary, *endpoint.analyses.sensitivity):
            out.extend(_role_findings(plan, endpoint, analysis))
            if analysis.method in IMPUTATION_METHODS:
                out.extend(_strategy_findings(plan, endpoint, analysis))
                out.extend(_congeniality_findings(plan, endpoint, analysis))
    return out


def _role_findings(plan, endpoint, analysis) -> Iterator[Finding]:
    primary = endpoint.analyses.primary
    if analysis is primary:
        return
    declared = analysis.role
    where = _where(endpoint, analysis)
    population, primary_population = analysis_population(plan, analysis), analysis_population(plan, primary)
    what = "declared a sensitivity analysis" if declared == "sensitivity" else "listed with the sensitivity analyses"
    then = ("a sensitivity analysis keeps the primary estimand and population (ICH E9(R1)); declare "
            "role: supplementary" if declared == "sensitivity" else
            "it is reported as supplementary; declare role: supplementary to say so in the plan")
    if declared == "supplementary":
        return
    if population != primary_population:
        yield Finding("estimand.sensitivity_population", analysis.id, f"{where}.population",
                      f"analysis {analysis.id!r} is {what} but analyses the {population} population, not the "
                      f"primary analysis' {primary_population}: {then}")
    elif analysis.estimand != primary.estimand:
        yield Finding("estimand.sensitivity_estimand", analysis.id, f"{where}.estimand",
                      f"analysis {analysis.id!r} is {what} but targets estimand {analysis.estimand!r}, not the "
                      f"primary {primary.estimand!r}: {then}")


def assumptions_after(options, event_id: str) -> set[str]:
    """The assumptions the values after ``event_id`` can follow under these imputation options."""
    rules = [rule for rule in getattr(options, "assumptions_by_reason", ()) if rule.event == event_id]
    chosen = {rule.assumption for rule in rules}
    if not rules or all(rule.reasons is not None for rule in rules):
        chosen.add(options.assumption)    # reasons no rule lists (or no rule at all) fall back to it
    return chosen


def _strategy_findings(plan, endpoint, analysis) -> Iterator[Finding]:
    if analysis.estimand is None:
        return
    estimand = plan.estimand(analysis.estimand)
    for handling in estimand.intercurrent_events:
        if handling.strategy != "hypothetical":
            continue
        clashing = sorted(assumptions_after(analysis.options, handling.event) & set(REFERENCE_BASED))
        if clashing and role_of(plan, endpoint, analysis) != "supplementary":
            words = " and ".join(ASSUMPTION_WORDS[name] for name in clashing)
            yield Finding(
                "estimand.strategy_conflict", analysis.id, f"{_where(endpoint, analysis)}.options.assumption",
                f"analysis {analysis.id!r} imputes values after {handling.event} under {words}, which models the "
                f"outcome after the event (a treatment-policy view), while estimand {estimand.id!r} handles "
                f"{handling.event} with the hypothetical strategy: it estimates another estimand — declare "
                "role: supplementary, or name an estimand whose strategy for this event is treatment_policy")


def covariate_structure(method: str, options) -> dict[str, str]:
    """covariate -> 'by visit' or 'common to all visits', as the analysis' model has it."""
    if method == "mmrm":
        by_visit = set(options.covariates_by_visit)
        names = list(dict.fromkeys([*options.covariates, *options.covariates_by_visit]))
        return {name: "by visit" if name in by_visit else "common to all visits" for name in names}
    if method == "ancova":       # one regression per visit: every covariate acts by visit
        return {name: "by visit" for name in options.covariates}
    effect = "by visit" if getattr(options, "covariate_effects", "by_visit") == "by_visit" else "common to all visits"
    return {name: effect for name in getattr(options, "covariates", ())}


def structure_words(structure: dict[str, str]) -> str:
    if not structure:
        return "no covariates"
    return ", ".join(f"{name} ({effect})" for name, effect in structure.items())


def _congeniality_findings(plan, endpoint, analysis) -> Iterator[Finding]:
    primary = endpoint.analyses.primary
    if primary.method not in ("mmrm", "ancova"):
        return
    wanted = covariate_structure(primary.method, primary.options)
    used = covariate_structure(analysis.method, analysis.options)
    where = f"{_where(endpoint, analysis)}.options"
    absent = [name for name in wanted if name not in used]
    if absent:
        yield Finding("estimand.imputation_fewer_covariates", analysis.id, f"{where}.covariates",
                      f"the imputation model of {analysis.id!r} leaves out {', '.join(absent)}, which the primary "
                      f"analysis adjusts for: the two are not congenial, and a difference between them may come "
                      f"from the model, not from the assumption about missing data — add them to covariates")
    differing = [name for name in wanted if name in used and used[name] != wanted[name]]
    if differing:
        yield Finding("estimand.imputation_structure", analysis.id, f"{where}.covariate_effects",
                      f"the imputation model of {analysis.id!r} gives {', '.join(differing)} an effect "
                      f"{used[differing[0]]}, the primary analysis {wanted[differing[0]]}: the two are not "
                      f"congenial, and a difference between them may come from the model, not from the "
                      f"assumption about missing data — set covariate_effects to match the primary model "
                      f"(primary: {structure_words(wanted)}; imputation: {structure_words(used)})")
