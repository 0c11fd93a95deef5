"""Words on an imputation analysis' estimand and model: its role, the assumptions chosen by
event and reason, its covariate structure beside the primary model's, and the condition on
which the usual ordering of reference-based estimates rests.  Reads the analysis entry of
Results only."""
from __future__ import annotations

from typing import Any, Mapping

ASSUMPTION_WORDS = {"mar": "missing at random", "jump_to_reference": "jump to reference",
                    "copy_reference": "copy reference", "copy_increments_in_reference": "copy increments in reference"}
REFERENCE_BASED = ("jump_to_reference", "copy_reference", "copy_increments_in_reference")
ORDERING = (
    "Reference-based estimates are often expected to order themselves — the effect largest under missing at "
    "random, then copy increments in reference, copy reference, and smallest under jump to reference. That "
    "ordering holds only when the effect of treatment over the reference grows over time up to the last visit; "
    "when the effect peaks early or fades, the estimates can fall in another order, and the order seen here says "
    "nothing on its own about the data.")


def imputation_guard_words(options: Mapping[str, Any], fit: Mapping[str, Any]) -> list[str]:
    words = []
    rules = (fit.get("assumption_rules") or {}).get("rules") or []
    if rules:
        column = (fit.get("assumption_rules") or {}).get("reason_column")
        counts = fit.get("participants_by_assumption") or {}
        counted = ", ".join(f"{n} under {ASSUMPTION_WORDS.get(name, name)}" for name, n in counts.items())
        unrecorded = (fit.get("assumption_rules") or {}).get("participants_without_reason") or 0
        words.append(
            f"Assumptions by intercurrent event and reason (read from {column}): "
            + "; ".join(_rule_text(rule) for rule in rules)
            + f"; any other event under {ASSUMPTION_WORDS.get(options.get('assumption'), options.get('assumption'))}."
            + (f" Participants with an event: {counted}." if counted else "")
            + (f" {unrecorded} participant(s) had no recorded reason and follow the default." if unrecorded else ""))
    structure = fit.get("covariate_structure") or {}
    if structure:
        same = structure.get("imputation_model") == structure.get("primary_model")
        words.append(
            f"Covariates of the imputation model: {structure.get('imputation_model')}; of the primary model: "
            f"{structure.get('primary_model')}. "
            + ("The two models treat the covariates alike (congenial)." if same else
               "The two models treat the covariates differently, so a difference between this analysis and the "
               "primary one can come from the models, not only from the assumption about missing data."))
    used = {options.get("assumption")} | {rule.split(": ")[-1] for rule in rules}
    if used & set(REFERENCE_BASED):
        words.append(ORDERING)
    return words


def _rule_text(rule: str) -> str:
    """'event (reasons): name' from the results, with the assumption in words."""
    head, _, name = rule.rpartition(": ")
    return f"{head}: {ASSUMPTION_WORDS.get(name, name)}"
