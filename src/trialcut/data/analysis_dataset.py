"""The derived analysis dataset of one endpoint, as an independent programmer needs it to
reproduce a number: one row per randomised participant × scheduled visit.

Columns: the participant, the arm, one membership flag per population, the visit (label,
number, planned day, the record's study day), whether the visit was due by the cut-off,
the value as recorded and its baseline and change, one flag per intercurrent event (it
happened on or before the visit), and per estimand the governing event, the strategy
applied, the value used, and whether the value was set aside, set by the composite strategy
or is filled in by the estimand's imputation analyses.  Every column has a label, and
:data:`DERIVATION_RULES` says in words how each derived column was made.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from trialcut.data.flow import step_of_rows, value_used

DERIVATION_RULES = (
    "Rows: every randomised participant of the data cut at every scheduled post-baseline visit of the plan; "
    "a visit without a record is kept with empty values.",
    "Visit: the analysis visit (by the plan's visit windows when windowing is on, else the visit as the data "
    "names it); one record per participant and visit is analysed, the one closest to the planned day.",
    "Baseline: the baseline column where filled, else the value of the participant's baseline record. Change: "
    "the change column where filled, else value minus baseline.",
    "Due: the visit was due by the data cut-off, that is randomisation date + planned day - 1 + window is on or "
    "before the cut-off, or a value was recorded. Without a randomisation date every visit counts as due. A visit "
    "not yet due is neither observed nor missing: no analysis uses, imputes or shifts it.",
    "Event flags: the intercurrent event happened on or before the visit (its study day is on or before the "
    "record's study day, or the planned day when there is no record).",
    "Governing event (per estimand): among the events on or before the visit, the earliest whose strategy "
    "changes the outcome (hypothetical or composite), else the earliest event.",
    "Value used (per estimand): the analysed value after the estimand's strategy: set aside (empty) under the "
    "hypothetical strategy, replaced by the plan's value under the composite strategy, kept as recorded under "
    "the treatment-policy strategy.",
    "Imputed (per estimand): a due visit without a used value, which the estimand's multiple-imputation and "
    "tipping-point analyses fill in; false when the estimand has no such analysis.",
)


@dataclass(frozen=True)
class AnalysisDataset:
    """One endpoint's derived analysis dataset: the frame, a label per column, the rules in words."""

    endpoint: str
    frame: pd.DataFrame
    labels: dict[str, str]
    rules: tuple[str, ...] = DERIVATION_RULES


def build_analysis_dataset(cut, endpoint_id: str, imputed_estimands: frozenset[str] = frozenset()) -> AnalysisDataset:
    """The dataset of ``endpoint_id`` over every randomised participant (no population applied)."""
    plan, cols = cut.plan, cut.plan.columns
    base = cut.analysis_data(endpoint_id)
    frame = base.frame
    endpoint = next(e for e in plan.endpoints if e.id == endpoint_id)
    days = {v.label: v.day for v in plan.visits.schedule}
    out = pd.DataFrame({
        "USUBJID": frame[cols.subject].astype(str), "ARM": frame[cols.arm].astype(str),
        **{f"IN_{p.id.upper()}": _population_flag(frame, p) for p in plan.populations},
        "AVISIT": frame[cols.visit].astype(str),
        "AVISITN": frame[cols.visit].map({v.label: v.order for v in plan.visits.schedule}).astype("int64"),
        "PLANDY": frame[cols.visit].map(days).astype(float),
        "ADY": _column(frame, cols.study_day), "DUE": frame["due"].astype(bool),
        "AVAL": _column(frame, cols.value), "BASE": _column(frame, base.baseline),
        "CHG": _column(frame, cols.change or "CHG"),
    })
    labels = {"USUBJID": "Participant identifier", "ARM": "Randomised arm (dummy arm in a blinded dry run)",
              **{f"IN_{p.id.upper()}": f"In population: {p.label}" for p in plan.populations},
              "AVISIT": "Analysis visit", "AVISITN": "Analysis visit number (order in the plan)",
              "PLANDY": "Planned study day of the visit", "ADY": "Study day of the analysed record",
              "DUE": "Visit due by the data cut-off", "AVAL": "Value as recorded", "BASE": "Baseline value",
              "CHG": "Change from baseline as recorded or derived"}
    study_day = _visit_day(frame, cols, days)
    for event in plan.intercurrent_events:
        name = f"EV_{event.id.upper()}"
        event_day = _column(frame, event.day_column)
        out[name] = (~np.isnan(event_day)) & (event_day <= study_day)
        labels[name] = f"Intercurrent event on or before the visit: {event.label}"
    for estimand in plan.estimands:
        _add_estimand(out, labels, cut, endpoint, estimand, estimand.id in imputed_estimands)
    return AnalysisDataset(endpoint_id, out.reset_index(drop=True), labels)


def _add_estimand(out: pd.DataFrame, labels: dict[str, str], cut, endpoint, estimand, imputed: bool) -> None:
    data = cut.analysis_data(endpoint.id, estimand_id=estimand.id, population_id=estimand.population)
    key = pd.MultiIndex.from_arrays([data.frame[data.subject].astype(str), data.frame[data.visit].astype(str)])
    steps = step_of_rows(data, {})
    used = value_used(steps).to_numpy()
    per_row = pd.DataFrame({
        "event": data.frame["intercurrent_event"].to_numpy(dtype=object),
        "strategy": data.frame["strategy"].to_numpy(dtype=object),
        "value": np.where(used, data.frame[data.outcome].to_numpy(dtype=float), np.nan),
        "set_aside": data.frame["outcome_set_missing"].to_numpy(dtype=bool),
        "composite": data.frame["outcome_set_composite"].to_numpy(dtype=bool),
        "imputed": imputed & data.frame["due"].to_numpy(dtype=bool) & ~used,
    }, index=key)
    rows = pd.MultiIndex.from_arrays([out["USUBJID"], out["AVISIT"]])
    aligned = per_row.reindex(rows)
    prefix = estimand.id.upper()
    columns = {
        f"{prefix}_EVENT": (aligned["event"].where(aligned["event"].notna(), None).to_numpy(dtype=object),
                            "Governing intercurrent event"),
        f"{prefix}_STRATEGY": (aligned["strategy"].where(aligned["strategy"].notna(), None).to_numpy(dtype=object),
                               "Strategy applied to the governing event"),
        f"{prefix}_VALUE": (aligned["value"].to_numpy(dtype=float), "Value used by the analyses"),
        f"{prefix}_SET_ASIDE": (aligned["set_aside"].fillna(False).to_numpy(dtype=bool),
                                "Recorded value set aside by the strategy"),
        f"{prefix}_COMPOSITE": (aligned["composite"].fillna(False).to_numpy(dtype=bool),
                                "Value set by the composite strategy"),
        f"{prefix}_IMPUTED": (aligned["imputed"].fillna(False).to_numpy(dtype=bool),
                              "Filled in by this estimand's imputation analyses"),
    }
    for name, (values, words) in columns.items():
        out[name] = values
        labels[name] = f"{words} (estimand {estimand.id}; empty outside its population)"


def _population_flag(frame: pd.DataFrame, population) -> pd.Series:
    if not population.flag or population.flag not in frame.columns:
        return pd.Series(True, index=frame.index)
    return frame[population.flag].eq("Y")


def _column(frame: pd.DataFrame, name: str | None) -> np.ndarray:
    if not name or name not in frame.columns:
        return np.full(len(frame), np.nan)
    return pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=float)


def _visit_day(frame: pd.DataFrame, cols, days) -> np.ndarray:
    planned = frame[cols.visit].map(days).astype(float).to_numpy()
    actual = _column(frame, cols.study_day)
    return np.where(np.isnan(actual), planned, actual)
