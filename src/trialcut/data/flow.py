"""Participant flow: every participant × visit of an estimand accounted for, in rows that add up.

Per visit and arm (``visit`` = a scheduled visit):

    randomised            = not_in_population + in_population
    in_population         = not_yet_due + due
    due                   = observed_before_event + observed_after_event_used
                            + observed_after_event_set_aside + composite_recorded
                            + composite_not_recorded + Σ missing_after_event:<event> + missing_no_event

and per participant (``visit`` = ``ALL_VISITS``):

    in_population         = with_value_used + no_visit_due + all_values_set_aside + all_due_values_missing

A value is *used* when it was observed and the strategy keeps it, or the composite strategy
sets it.  Every other count of a run derives from these rows: the observed-data summaries
count the values recorded (the four ``observed``/``composite_recorded`` rows), a model fitted
to the estimand's data counts the used values and the participants with at least one, and an
imputation fills the due cells without a used value.  Nothing here models anything.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

DUE = "due"
OBSERVED = "outcome_observed"
ALL_VISITS = "All visits"

STEP_LABELS = {
    "randomised": "Randomised",
    "not_in_population": "Not in the analysis population",
    "in_population": "In the analysis population",
    "not_yet_due": "Visit not yet due at the cut-off",
    "due": "Visit due by the cut-off",
    "observed_before_event": "Value observed, no intercurrent event before the visit",
    "observed_after_event_used": "Value observed after an intercurrent event, used",
    "observed_after_event_set_aside": "Value observed after an intercurrent event, set aside by the strategy",
    "composite_recorded": "Value replaced by the composite strategy (a value was recorded)",
    "composite_not_recorded": "Value set by the composite strategy (no value was recorded)",
    "missing_no_event": "Value missing, no intercurrent event before the visit",
    "with_value_used": "Participants with at least one value used",
    "no_visit_due": "Left out: no visit due yet",
    "all_values_set_aside": "Left out: every observed value set aside by the strategy",
    "all_due_values_missing": "Left out: no value at any due visit",
}
MISSING_AFTER = "missing_after_event:"
VISIT_PARTS = ("observed_before_event", "observed_after_event_used", "observed_after_event_set_aside",
               "composite_recorded", "composite_not_recorded")
LEFT_OUT_REASONS = ("no_visit_due", "all_values_set_aside", "all_due_values_missing")
USED_PARTS = ("observed_before_event", "observed_after_event_used", "composite_recorded", "composite_not_recorded")
RECORDED_PARTS = ("observed_before_event", "observed_after_event_used", "observed_after_event_set_aside",
                  "composite_recorded")


def step_of_rows(data, events: dict[str, str]) -> pd.Series:
    """The flow step of every row of ``data.frame`` (an AnalysisData): one label key per row."""
    frame = data.frame
    observed = frame[OBSERVED].to_numpy(dtype=bool)
    due = frame[DUE].to_numpy(dtype=bool)
    event = frame["intercurrent_event"].to_numpy(dtype=object)
    has_event = pd.notna(event)
    set_aside = frame["outcome_set_missing"].to_numpy(dtype=bool)
    composite = frame["outcome_set_composite"].to_numpy(dtype=bool)
    # Named once per distinct event (code -1, no event, takes the last name), not once per row.
    codes, distinct = pd.factorize(event)
    names = np.array([f"{MISSING_AFTER}{e}" for e in distinct] + ["missing_no_event"], dtype=object)
    missing_after = names[codes]
    steps = np.select(
        [~due, composite & observed, composite, set_aside, observed & has_event, observed],
        ["not_yet_due", "composite_recorded", "composite_not_recorded", "observed_after_event_set_aside",
         "observed_after_event_used", "observed_before_event"],
        default="")
    steps = np.where(steps == "", missing_after, steps)
    return pd.Series(steps, index=frame.index, dtype=object)


def value_used(steps: pd.Series) -> pd.Series:
    return steps.isin(USED_PARTS)


def flow_table(subjects: pd.DataFrame, data, events: dict[str, str], arms: tuple[str, ...]) -> pd.DataFrame:
    """The flow of one estimand (``data``) among ``subjects`` (every randomised participant).

    ``events``: event id -> label, in the plan's order.  Columns: visit, step, label, one per
    arm, Total.
    """
    frame = data.frame.assign(__step=step_of_rows(data, events))
    randomised = _per_arm(subjects[data.arm], arms)
    population = _per_arm(frame.drop_duplicates(data.subject)[data.arm], arms)
    # Every (visit, step, arm) count in one pass, read back per visit and step below.
    tally = frame.groupby([frame[data.visit], frame["__step"], frame[data.arm].astype(str)], sort=False).size()
    tally = {key: int(count) for key, count in tally.items()}
    rows = []
    for visit in data.visits:
        counts = {step: np.array([tally.get((visit, step, arm), 0) for arm in arms], dtype=np.int64)
                  for step in _visit_steps(events)}
        due = sum((counts[step] for step in _due_steps(events)), _zeros(arms))
        rows += [_row(visit, "randomised", randomised), _row(visit, "not_in_population", randomised - population),
                 _row(visit, "in_population", population), _row(visit, "not_yet_due", counts["not_yet_due"]),
                 _row(visit, "due", due)]
        rows += [_row(visit, step, counts[step], events) for step in _due_steps(events)]
    rows += _participant_rows(frame, data, randomised, population, arms)
    return pd.DataFrame(rows, columns=["visit", "step", "label", *arms, "Total"])


def _visit_steps(events: dict[str, str]) -> list[str]:
    return ["not_yet_due", *_due_steps(events)]


def _due_steps(events: dict[str, str]) -> list[str]:
    return [*VISIT_PARTS, *(f"{MISSING_AFTER}{e}" for e in events), "missing_no_event"]


def _participant_rows(frame: pd.DataFrame, data, randomised, population, arms) -> list[list[Any]]:
    reasons = left_out_reasons(frame, data)
    rows = [_row(ALL_VISITS, "randomised", randomised), _row(ALL_VISITS, "not_in_population", randomised - population),
            _row(ALL_VISITS, "in_population", population)]
    kept = population - _per_arm(reasons[data.arm], arms)
    rows.append(_row(ALL_VISITS, "with_value_used", kept))
    for reason in LEFT_OUT_REASONS:
        rows.append(_row(ALL_VISITS, reason, _per_arm(reasons.loc[reasons["reason"] == reason, data.arm], arms)))
    return rows


def left_out_reasons(frame: pd.DataFrame, data) -> pd.DataFrame:
    """Participants of the population without any used value: participant, arm, reason (a step key)."""
    steps = frame["__step"] if "__step" in frame.columns else step_of_rows(data, {})
    per = pd.DataFrame({"subject": frame[data.subject], "arm": frame[data.arm], "used": value_used(steps),
                        "due": frame[DUE].astype(bool), "recorded": frame[OBSERVED].astype(bool)})
    grouped = per.groupby("subject", sort=True).agg(arm=("arm", "first"), used=("used", "any"), due=("due", "any"),
                                                    recorded=("recorded", "any"))
    out = grouped[~grouped["used"]]
    reason = np.where(~out["due"], "no_visit_due", np.where(out["recorded"], "all_values_set_aside",
                                                             "all_due_values_missing"))
    result = pd.DataFrame({"subject": out.index, "arm": out["arm"].to_numpy(), "reason": reason})
    return result.rename(columns={"subject": data.subject, "arm": data.arm}).reset_index(drop=True)


def left_out_table(data, events: dict[str, str]) -> pd.DataFrame:
    """Participants of ``data`` a fit to its used values leaves out, with the reason in words."""
    frame = data.frame.assign(__step=step_of_rows(data, events))
    reasons = left_out_reasons(frame, data)
    return pd.DataFrame({"participant": reasons[data.subject].astype(str), "arm": reasons[data.arm].astype(str),
                         "reason": reasons["reason"].map(STEP_LABELS).str.replace("Left out: ", "", regex=False)})


def _per_arm(arm_values: pd.Series, arms: tuple[str, ...]) -> np.ndarray:
    counts = arm_values.astype(str).value_counts()
    return np.array([int(counts.get(a, 0)) for a in arms], dtype=np.int64)


def _zeros(arms) -> np.ndarray:
    return np.zeros(len(arms), dtype=np.int64)


def _row(visit: str, step: str, counts: np.ndarray, events: dict[str, str] | None = None) -> list[Any]:
    if step.startswith(MISSING_AFTER):
        event = step[len(MISSING_AFTER):]
        label = f"Value missing after an intercurrent event: {(events or {}).get(event, event)}"
    else:
        label = STEP_LABELS[step]
    return [visit, step, label, *(int(c) for c in counts), int(counts.sum())]


# --------------------------------------------------------------------------- views derived from the flow
def missing_by_visit(flow: pd.DataFrame, arms: tuple[str, ...]) -> pd.DataFrame:
    """Per arm and visit: in the population, not yet due, due, values recorded, set aside, missing."""
    rows = []
    for arm in arms:
        for visit, part in flow[flow["visit"] != ALL_VISITS].groupby("visit", sort=False):
            count = dict(zip(part["step"], part[arm]))
            recorded = sum(count[s] for s in RECORDED_PARTS)
            missing = count["due"] - recorded
            percent = 100.0 * missing / count["due"] if count["due"] else float("nan")
            rows.append((arm, visit, count["in_population"], count["not_yet_due"], count["due"], recorded,
                         count["observed_after_event_set_aside"], missing, percent))
    return pd.DataFrame(rows, columns=["arm", "visit", "in_population", "not_yet_due", "due", "observed",
                                       "set_aside", "missing", "percent_missing"])


def patterns(data, events: dict[str, str], arms: tuple[str, ...]) -> pd.DataFrame:
    """Participants per arm and pattern: X value used, . due without a used value, - not yet due."""
    frame = data.frame.assign(__step=step_of_rows(data, events))
    mark = np.where(~frame[DUE].astype(bool), "-", np.where(value_used(frame["__step"]), "X", "."))
    order = {v: i for i, v in enumerate(data.visits)}
    marks = frame.assign(__mark=mark, __order=frame[data.visit].map(order)).sort_values([data.subject, "__order"])
    per_subject = _patterns_per_subject(marks, data)
    rows = []
    for arm in arms:
        in_arm = per_subject[per_subject["arm"].astype(str) == arm]["pattern"]
        for pattern, count in sorted(in_arm.value_counts().items(), key=lambda item: (-item[1], item[0])):
            observed_part = pattern.rstrip("-")
            rows.append((arm, pattern, int(count), count / len(in_arm), "X" not in observed_part.lstrip("X")))
    return pd.DataFrame(rows, columns=["arm", "pattern", "count", "share", "monotone"])


def _patterns_per_subject(marks: pd.DataFrame, data) -> pd.DataFrame:
    """Per participant (sorted): arm and the marks joined in visit order."""
    t, subjects = len(data.visits), marks[data.subject].to_numpy()
    rectangular = t and len(marks) % t == 0 and (subjects.reshape(-1, t) == subjects[::t, None]).all() \
        and pd.Index(subjects[::t]).is_unique
    if not rectangular:
        return marks.groupby(data.subject, sort=True).agg(arm=(data.arm, "first"), pattern=("__mark", "".join))
    # The usual grid: every participant has one row per scheduled visit, so a row of the
    # reshaped marks is a participant's pattern (no groupby of Python joins per participant).
    grid = marks["__mark"].to_numpy(dtype=object).reshape(-1, t)
    return pd.DataFrame({"arm": marks[data.arm].to_numpy()[::t], "pattern": ["".join(row) for row in grid]},
                        index=pd.Index(subjects[::t], name=data.subject))


def with_not_yet_due(summary: pd.DataFrame, flow: pd.DataFrame) -> pd.DataFrame:
    """An arm × visit summary with the flow's count of visits not yet due beside its n (None
    where the row is not a scheduled visit, e.g. baseline), so that n and not yet due are read
    together: n + not yet due + missing = the participants of the population."""
    not_due = {(arm, visit): int(count) for visit, step, arm, count in _long(flow) if step == "not_yet_due"}
    values = [not_due.get((str(a), str(v))) for a, v in zip(summary["arm"], summary["visit"])]
    position = list(summary.columns).index("n") + 1 if "n" in summary.columns else len(summary.columns)
    out = summary.copy()
    out.insert(position, "not_yet_due", pd.array(values, dtype="Int64"))
    return out


def _long(flow: pd.DataFrame):
    arms = [c for c in flow.columns if c not in ("visit", "step", "label", "Total")]
    for record in flow.to_dict("records"):
        for arm in arms:
            yield record["visit"], record["step"], arm, record[arm]
