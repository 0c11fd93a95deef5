"""The registry of analysis methods a plan can name.

Each method takes the data layer's ``AnalysisData``, the plan's analysis entry and the
``RunContext`` and returns exactly the parts of the analysis entry of Results that only it
knows: ``tables`` (at least ``differences`` for comparative methods), ``fit`` and
``diagnostics``.  The runner owns identity, options, status and timing.  The registry's keys equal
``trialcut.plan.schema.ANALYSIS_METHODS`` (checked by a test), so a new method is added
there and here, and nowhere else.
"""
from __future__ import annotations

import functools
from typing import Any, Protocol

import numpy as np

from trialcut.errors import FitError, Problem
from trialcut.run import methods_responder
from trialcut.run.context import RunContext
from trialcut.run.tables import plain, table
from trialcut.stats.blas_threads import one_blas_thread


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
        visit_times=_visit_times(data.visit_days),
    )
    level = options.confidence_level
    differences = table(fit.differences(confidence_level=level), "Differences from the reference arm")
    if context.estimates_only:
        return {"tables": {"differences": differences},
                "fit": {"structure": fit.structure, "converged": fit.converged}, "diagnostics": {}}
    tables = {
        "differences": differences,
        "marginal_means": table(fit.marginal_means(confidence_level=level), "Model-estimated means by arm and visit"),
        "joint_tests": table(fit.joint_tests(), "Tests of each effect, all its coefficients at once"),
        "fixed_effects": table(fit.fixed_effects, "Estimated coefficients of the model"),
    }
    tables.update(_covariance_tables(fit))
    return {
        "tables": tables,
        "fit": plain(_fit_summary(fit.to_dict())),
        "diagnostics": {"residuals": table(fit.residuals(), "Residuals and fitted values")},
    }


def _visit_times(visit_days: dict[str, float | None]) -> dict[str, float] | None:
    """The planned days when every visit has one; else None, and the fit uses the visits'
    order (1, 2, …), which is all a structure other than spatial_exponential needs (the plan
    check refuses spatial_exponential without days)."""
    if visit_days and all(day is not None for day in visit_days.values()):
        return dict(visit_days)
    return None


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
    """Keep the fit's scalar facts; its tables are already under ``tables`` and its residuals under
    ``diagnostics`` (results format 1 kept them here too, the same numbers by column: a fifth of
    results.json)."""
    return {k: v for k, v in fit_record.items()
            if k != "residual_columns" and not (isinstance(v, dict) and "columns" in v and "data" in v)}


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


def _failing_on_numbers(method: AnalysisMethod) -> AnalysisMethod:
    """Arithmetic that breaks on the data (a singular or indefinite matrix, an overflow) is a
    failed analysis with its reason, recorded while the other analyses go on; it is never an
    internal fault, because it comes from the data cut (an outcome or covariate that does not
    vary, very few participants per arm, values of absurd size).

    Every method runs with one BLAS thread (trialcut.stats.blas_threads), here where the runner,
    the subgroups and each simulated trial call it: its numbers then never depend on the
    machine's cores or OPENBLAS_NUM_THREADS.  Work a method sends to other processes gets the
    same limit from the executor (trialcut.run.executor)."""

    @functools.wraps(method)
    def run(data, analysis, context: RunContext) -> dict[str, Any]:
        try:
            with one_blas_thread():
                return method(data, analysis, context)
        except (np.linalg.LinAlgError, FloatingPointError, OverflowError, ZeroDivisionError) as error:
            reason = str(error) or type(error).__name__
            raise FitError(f"the analysis could not be computed on this data cut ({reason})", [Problem(
                code="run.numerical_failure", message="the arithmetic of the analysis broke down on the data",
                field=analysis.id, got=f"{type(error).__name__}: {reason}",
                hint="look for an outcome or covariate that does not vary, arms with very few participants "
                     "or values of absurd size (declare the endpoint's range in the plan)")]) from error

    return run


METHODS: dict[str, AnalysisMethod] = {
    "mmrm": _failing_on_numbers(run_mmrm),
    "ancova": _failing_on_numbers(run_ancova),
    "multiple_imputation": _failing_on_numbers(run_multiple_imputation),
    "tipping_point": _failing_on_numbers(run_tipping_point),
    # Binary and count endpoints (trialcut.run.methods_responder).
    "gee": _failing_on_numbers(methods_responder.run_gee),
    "rate": _failing_on_numbers(methods_responder.run_rate),
    "proportions": _failing_on_numbers(methods_responder.run_proportions),
    "responder_imputation": _failing_on_numbers(methods_responder.run_responder_imputation),
}
