"""Which imputation assumption each participant's values after an intercurrent event follow.

The plan's ``assumptions_by_reason`` rules name an event, optionally the reasons (values of
``reason_column``) they cover, and an assumption; the first rule that matches a participant's
governing event and reason wins.  Events no rule names follow the analysis' ``assumption``, and
so does a participant whose reason is not recorded (counted, and said in the results).  A
recorded reason that no rule of its event covers is an error of the plan against the data:
exit 2, naming the column, the values and the first participants.
"""
from __future__ import annotations

from typing import Any

import pandas as pd

from trialcut.errors import DataError, Problem


def participant_assumptions(data, options) -> tuple[dict[Any, str] | None, dict[str, Any]]:
    """(participant -> assumption name, facts for the results); (None, {}) when no rule is declared."""
    rules = tuple(options.assumptions_by_reason)
    if not rules:
        return None, {}
    frame = data.frame
    events = _first_per_participant(frame, data, "intercurrent_event")
    reasons = _reasons(frame, data, options.reason_column) if options.reason_column else None
    chosen: dict[Any, str] = {}
    unmapped: dict[str, list[Any]] = {}
    unrecorded = 0
    for subject, event in events.dropna().items():
        reason = None if reasons is None else reasons.get(subject)
        reason = None if reason is None or pd.isna(reason) else str(reason)
        assumption, matched = _match(rules, str(event), reason, options.assumption)
        if not matched and reason is not None:
            unmapped.setdefault(reason, []).append(subject)
        unrecorded += int(reason is None and any(r.event == event and r.reasons is not None for r in rules))
        chosen[subject] = assumption
    if unmapped:
        raise _unmapped_error(options.reason_column, unmapped, rules)
    facts = {"reason_column": options.reason_column, "rules": [_rule_words(r) for r in rules],
             "participants_without_reason": unrecorded}
    return chosen, facts


def _match(rules, event: str, reason: str | None, default: str) -> tuple[str, bool]:
    own = [rule for rule in rules if rule.event == event]
    if not own:
        return default, True                    # no rule for this event: the analysis' assumption
    for rule in own:
        if rule.reasons is None or (reason is not None and reason in rule.reasons):
            return rule.assumption, True
    return default, False


def _first_per_participant(frame: pd.DataFrame, data, column: str) -> pd.Series:
    if column not in frame.columns:
        return pd.Series(dtype=object)
    order = {visit: position for position, visit in enumerate(data.visits)}
    ordered = frame.assign(_order=frame[data.visit].astype(str).map(order)).sort_values([data.subject, "_order"])
    # first() skips missing values: each participant's first recorded value in visit order.
    return ordered.groupby(data.subject, sort=True)[column].first()


def _reasons(frame: pd.DataFrame, data, column: str) -> pd.Series:
    if column not in frame.columns:
        raise DataError(f"the reason column {column} is not in the data cut", [Problem(
            code="data.missing_reason_column", message="the plan reads imputation assumptions by reason from a "
            "column the data cut lacks", field=column, expected=f"a column {column}", got="no such column",
            hint="add the column to the export, or correct reason_column in the plan")])
    return _first_per_participant(frame, data, column)


def _unmapped_error(column: str, unmapped: dict[str, list[Any]], rules) -> DataError:
    listed = sorted({reason for rule in rules for reason in (rule.reasons or ())})
    participants = tuple(subject for subjects in unmapped.values() for subject in subjects)
    return DataError(f"the reason column {column} holds values the plan does not map", [Problem(
        code="data.unmapped_reason", message=f"{len(participants)} participant(s) have a reason no rule of "
        "assumptions_by_reason covers", field=column, expected="one of " + ", ".join(map(repr, listed)),
        got=", ".join(repr(r) for r in sorted(unmapped)), rows=participants,
        hint="add the reason to a rule, or add a rule for the event without 'reasons' to cover the rest")])


def _rule_words(rule) -> str:
    reasons = "any reason" if rule.reasons is None else ", ".join(rule.reasons)
    return f"{rule.event} ({reasons}): {rule.assumption}"


def check_reasons(plan, cut) -> None:
    """Every reason the data hold is covered, checked before any model is fitted, so that a
    mapping mistake stops the run at once (the same check the imputation makes)."""
    from trialcut.plan.estimand_checks import analysis_population

    for endpoint in plan.endpoints:
        for analysis in endpoint.analyses.sensitivity:
            if getattr(analysis.options, "assumptions_by_reason", ()):
                data = cut.analysis_data(endpoint.id, estimand_id=analysis.estimand,
                                         population_id=analysis_population(plan, analysis))
                participant_assumptions(data, analysis.options)
