"""Roles and estimand guard-rails carried into the results of a run.

Each analysis entry gets its ICH E9(R1) role (primary, sensitivity or supplementary, see
:mod:`trialcut.plan.estimand_checks`); each imputation analysis states its model's covariate
structure beside the primary model's; the plan's guard-rail findings go to
``results["estimand_checks"]`` and, in words, to the run's warnings (so the audit record has them).
"""
from __future__ import annotations

from typing import Any

from trialcut.plan.estimand_checks import (
    IMPUTATION_METHODS,
    covariate_structure,
    findings,
    role_of,
    structure_words,
)


def annotate(plan, results: dict[str, Any]) -> None:
    """Set roles and covariate structures on the analysis entries; record the findings."""
    for entry, endpoint in zip(results["endpoints"], plan.endpoints):
        primary = endpoint.analyses.primary
        declared = {a.id: a for a in (primary, *endpoint.analyses.sensitivity)}
        for analysis in entry["analyses"]:
            planned = declared.get(analysis["id"])
            if planned is None:
                continue
            analysis["role"] = role_of(plan, endpoint, planned)
            if planned.method in IMPUTATION_METHODS and isinstance(analysis.get("fit"), dict):
                analysis["fit"]["covariate_structure"] = {
                    "imputation_model": structure_words(covariate_structure(planned.method, planned.options)),
                    "primary_model": structure_words(covariate_structure(primary.method, primary.options)),
                }
    found = findings(plan)
    results["estimand_checks"] = [finding.to_dict() for finding in found]
    results["warnings"].extend(f"{finding.analysis}: {finding.message}" for finding in found)
