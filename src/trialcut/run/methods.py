"""The registry of analysis methods a plan can name.

Each method takes the data layer's ``AnalysisData``, the plan's analysis entry and the
``RunContext`` and returns exactly the parts of the analysis entry of Results that only it
knows: ``tables`` (at least ``differences`` for comparative methods), ``fit`` and
``diagnostics``.  The runner owns identity, options, status and timing.  The registry's keys equal
``trialcut.plan.schema.ANALYSIS_METHODS`` (checked by a test), so a new method is added
there and here, and nowhere else.
"""
from __future__ import annotations

from typing import Any, Protocol

from trialcut.run.context import RunContext
from trialcut.run.tables import plain, table


class AnalysisMethod(Protocol):
    def __call__(self, data: Any, analysis: Any, context: RunContext) -> dict[str, Any]: ...


def run_mmrm(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.stats.mmrm import fit_mmrm

    options = analysis.options
    fit = fit_mmrm(
        data.frame,
        outcome=data.outcome, subject=data.subject, visit=data.visit, arm=data.arm,
        reference=data.reference, visits=list(data.visits),
        covariates=tuple(options.covariates),
        covariates_by_visit=tuple(options.covariates_by_visit),
        covariance=list(options.covariance),
        covariance_by=options.covariance_by,
        method=options.method, df=options.df, second_derivatives=options.second_derivatives,
        robust=options.robust,
        visit_times=dict(data.visit_days),
    )
    level = options.confidence_level
    tables = {
        "differences": table(fit.differences(confidence_level=level), "Differences from the reference arm"),
        "marginal_means": table(fit.marginal_means(confidence_level=level), "Model-estimated means by arm and visit"),
        "joint_tests": table(fit.joint_tests(), "Joint tests of model terms"),
        "fixed_effects": table(fit.fixed_effects, "Fixed-effect estimates"),
    }
    tables.update(_covariance_tables(fit))
    fit_record = plain(fit.to_dict())
    residuals = fit.residuals()
    return {
        "tables": tables,
        "fit": _fit_summary(fit_record),
        "diagnostics": {"residuals": table(residuals, "Residuals and fitted values")},
    }


def _covariance_tables(fit) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for kind, getter in (("covariance", fit.covariance_matrix), ("correlation", fit.correlation_matrix)):
        matrices = getter()
        if isinstance(matrices, dict):
            for group, matrix in matrices.items():
                out[f"{kind}_{group}"] = table(matrix.reset_index(names="visit"),
                                               f"Estimated {kind} matrix ({group})")
        else:
            out[kind] = table(matrices.reset_index(names="visit"), f"Estimated {kind} matrix")
    return out


def _fit_summary(fit_record: dict[str, Any]) -> dict[str, Any]:
    """Keep the fit's scalar facts; its tables are already under ``tables``."""
    return {k: v for k, v in fit_record.items() if not (isinstance(v, dict) and "columns" in v and "data" in v)}


def run_ancova(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.stats.ancova import ancova_by_visit

    options = analysis.options
    if options.visits == "all":
        visits = list(data.visits)
    elif options.visits == "primary":
        visits = [data.primary_visit]
    else:
        visits = list(options.visits)
    result = ancova_by_visit(
        data.frame, outcome=data.outcome, subject=data.subject, arm=data.arm, visit=data.visit,
        reference=data.reference, visits=visits, covariates=tuple(options.covariates),
        confidence_level=options.confidence_level,
    )
    return {
        "tables": {
            "differences": table(result.differences(), "Differences from the reference arm (observed data)"),
            "adjusted_means": table(result.adjusted_means(), "Adjusted means by arm and visit (observed data)"),
        },
        # What a reader needs to know about the fit, in words (the tables carry the numbers).
        "fit": {"visits": ", ".join(visits), "covariates": ", ".join(options.covariates) or "none",
                "outcome": data.outcome, "reference": data.reference, "confidence_level": options.confidence_level},
        "diagnostics": {"per_visit": plain(result.to_dict())},
    }


def run_multiple_imputation(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.run.sensitivity import run_multiple_imputation as run

    return run(data, analysis, context)


def run_tipping_point(data, analysis, context: RunContext) -> dict[str, Any]:
    from trialcut.run.sensitivity import run_tipping_point as run

    return run(data, analysis, context)


METHODS: dict[str, AnalysisMethod] = {
    "mmrm": run_mmrm,
    "ancova": run_ancova,
    "multiple_imputation": run_multiple_imputation,
    "tipping_point": run_tipping_point,
}
