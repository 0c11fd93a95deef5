"""One simulated trial of a scenario, as a data cut in the plan's own column names.

Changes from baseline follow a multivariate normal distribution per arm (the scenario's mean
change per visit, standard deviations and correlation between visits); baseline is normal,
cut to its bounds.  Participants leave the study before a visit with the scenario's rate for
their arm and visit; under ``at_random_last_value`` the log-odds of leaving move by ``slope``
per standard deviation of the last observed change (standardised within the arm), and under
``not_at_random_shift`` the values after leaving are, in the full data, ``shift`` higher than
the model says (they are never observed).  Intercurrent events happen between visits with
their own rates; values after an event are still recorded (what the estimand's strategy does
with them is the plan's business).  Everything is drawn from one numpy Generator, so one seed
gives one trial, whatever process draws it.
"""
from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

FIRST_RANDOMISATION = dt.date(2020, 1, 6)   # in the past: a cut-off after today is refused
STRATUM_LEVELS = ("Stratum 1", "Stratum 2")


@dataclass(frozen=True)
class SimulatedTrial:
    frame: pd.DataFrame            # one record per participant and visit, baseline included
    cut_off: dt.date
    full_difference: dict[str, float]   # arm -> full-data mean change difference at the primary visit
    left_by_primary: dict[str, float]   # arm -> share of participants who left before the primary visit


def simulate_scenario_trial(plan, scenario, rng: np.random.Generator) -> SimulatedTrial:
    arms = list(plan.arms.codes)
    visits = [v for v in plan.visits.schedule]
    labels = [v.label for v in visits]
    endpoint = plan.endpoints[0]
    arm_of = np.repeat(np.arange(len(arms)), [scenario.participants_per_arm[a] for a in arms])
    n = arm_of.size
    start = np.round(rng.permutation(np.linspace(0, scenario.enrolment_days, n)))
    base = scenario.baseline
    baseline = np.clip(rng.normal(base.mean, base.sd, n), base.lower if base.lower is not None else -np.inf,
                       base.upper if base.upper is not None else np.inf)
    means = np.array([[scenario.mean_change[a][v] for v in labels] for a in arms])[arm_of]
    sds = np.array([scenario.sd[v] for v in labels])
    root = np.linalg.cholesky(scenario.correlation.for_visits(len(labels)))
    change = means + (rng.standard_normal((n, len(labels))) @ root.T) * sds
    left = _leave_visit(scenario, arms, labels, arm_of, change, means, sds, rng)
    full = change.copy()
    if scenario.dropout is not None and scenario.dropout.mechanism == "not_at_random_shift":
        full = np.where(np.arange(len(labels))[None, :] >= left[:, None], change + scenario.dropout.shift, change)
    events = _event_days(plan, scenario, arms, visits, arm_of, rng)
    primary = labels.index(endpoint.primary_visit)
    cut_off_day = scenario.cut_off_day if scenario.cut_off_day is not None else int(
        scenario.enrolment_days + max(v.day or 0 for v in visits) + max(v.window or 0 for v in visits) + 7)
    frame = _records(plan, endpoint, arms, visits, arm_of, start, baseline, change, left, events, cut_off_day, rng)
    reference = arms.index(plan.arms.reference)
    in_arm = [arm_of == index for index in range(len(arms))]
    return SimulatedTrial(
        frame=frame, cut_off=FIRST_RANDOMISATION + dt.timedelta(days=cut_off_day),
        full_difference={a: float(full[in_arm[i], primary].mean() - full[in_arm[reference], primary].mean())
                         for i, a in enumerate(arms) if i != reference},
        left_by_primary={a: float((left[in_arm[i]] <= primary).mean()) for i, a in enumerate(arms)})


def _leave_visit(scenario, arms, labels, arm_of, change, means, sds, rng) -> np.ndarray:
    """Index of the first visit each participant misses by leaving (len(labels) if never)."""
    n, count = change.shape
    left = np.full(n, count)
    dropout = scenario.dropout
    if dropout is None:
        return left
    rates = np.array([[dropout.rates.get(a, {}).get(v, 0.0) for v in labels] for a in arms])[arm_of]
    for k in range(count):
        present = left == count
        rate = rates[:, k]
        if dropout.mechanism != "completely_at_random" and dropout.slope:
            # The last observed change (the first visit's predecessor is baseline: no change yet).
            last = (change[:, k - 1] - means[:, k - 1]) / sds[k - 1] if k else np.zeros(n)
            with np.errstate(divide="ignore", over="ignore"):
                logit = np.log(rate) - np.log1p(-rate) + dropout.slope * last
                rate = np.where(rate <= 0, 0.0, np.where(rate >= 1, 1.0, 1 / (1 + np.exp(-logit))))
        leaving = present & (rng.random(n) < rate)
        left[leaving] = k
    return left


def _event_days(plan, scenario, arms, visits, arm_of, rng) -> dict[str, tuple[np.ndarray, str | None]]:
    """Per simulated event: the study day it happened (NaN if never) and its reason."""
    n = arm_of.size
    out = {}
    for declared in scenario.intercurrent_events:
        rates = np.array([[declared.rates.get(a, {}).get(v.label, 0.0) for v in visits] for a in arms])[arm_of]
        day = np.full(n, np.nan)
        previous = 1.0
        for k, visit in enumerate(visits):
            planned = float(visit.day if visit.day is not None else k + 2)
            happens = np.isnan(day) & (rng.random(n) < rates[:, k])
            # Between the previous visit and this one: it governs this visit and every later one.
            day[happens] = np.floor((previous + planned) / 2)
            previous = planned
        out[declared.event] = (day, declared.reason)
    return out


def _records(plan, endpoint, arms, visits, arm_of, start, baseline, change, left, events, cut_off_day, rng):
    columns = plan.columns
    n, count = change.shape
    ids = np.array([f"SIM-{i + 1:06d}" for i in range(n)], dtype=object)
    planned = np.array([float(v.day if v.day is not None else k + 2) for k, v in enumerate(visits)])
    # Baseline first, then each visit; a visit after leaving or after the cut-off has no record.
    person = np.concatenate([np.arange(n), np.repeat(np.arange(n), count)])
    visit_index = np.concatenate([np.full(n, -1), np.tile(np.arange(count), n)])
    keep = (visit_index < left[person]) & (start[person] + np.where(visit_index < 0, 1, planned[visit_index.clip(0)])
                                           - 1 <= cut_off_day)
    person, visit_index = person[keep], visit_index[keep]
    post = visit_index >= 0
    value_change = np.where(post, change[person, visit_index.clip(0)], np.nan)
    value = baseline[person] + np.where(post, value_change, 0.0)
    if endpoint.range is not None:
        value = np.clip(value, *endpoint.range)
        value_change = np.where(post, value - baseline[person], np.nan)
    labels = np.array([plan.visits.baseline] + [v.label for v in visits], dtype=object)
    data: dict[str, Any] = {columns.subject: ids[person], columns.arm: np.array(arms, dtype=object)[arm_of[person]],
                            columns.visit: labels[visit_index + 1], columns.value: value}
    optional = {
        "visit_number": visit_index + 1,
        "study_day": np.where(post, planned[visit_index.clip(0)], 1.0),
        "baseline": baseline[person],
        "change": np.where(post, value_change, np.nan),
        "baseline_flag": np.where(post, "", "Y").astype(object),
        "parameter": np.full(person.size, endpoint.parameter or "SIM", dtype=object),
        "randomisation_date": np.array([(FIRST_RANDOMISATION + dt.timedelta(days=int(d))).isoformat()
                                        for d in start], dtype=object)[person],
    }
    for role, values in optional.items():
        name = getattr(columns, role, None)
        if name:
            data[name] = values
    for population in plan.populations:
        if population.flag:
            data[population.flag] = np.full(person.size, "Y", dtype=object)
    for stratum in plan.arms.strata:
        data[stratum] = np.array(STRATUM_LEVELS, dtype=object)[rng.integers(0, 2, n)][person]
    reasons = _reason_columns(plan)
    for event in plan.intercurrent_events:
        day, reason = events.get(event.id, (np.full(n, np.nan), None))
        data[event.day_column] = day[person]
        for column in reasons:
            if reason is not None:
                previous = data.get(column, np.full(person.size, None, dtype=object))
                data[column] = np.where(~np.isnan(day[person]), reason, previous)
    for column in reasons:
        data.setdefault(column, np.full(person.size, None, dtype=object))
    return pd.DataFrame(data)


def _reason_columns(plan) -> list[str]:
    """Columns of reasons that imputation analyses read (e.g. why treatment stopped)."""
    found = []
    for endpoint in plan.endpoints:
        for analysis in endpoint.analyses.every:
            column = getattr(analysis.options, "reason_column", None)
            if column and column not in found:
                found.append(column)
    return found
