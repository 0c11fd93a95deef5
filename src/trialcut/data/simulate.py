"""An invented trial for the demo and the examples: study LVT-201 of lorvatide (both invented).

Participants are enrolled over time, randomised 1:1:1 in permuted blocks within the
stratum STRAT1R, and scored on the Fatigue Burden Score (invented, 0–60, higher is worse)
at baseline and at weeks 2, 4, 8 and 12.  Within-participant errors follow a continuous-time
first-order autoregressive correlation on the actual study days plus a participant effect.
Each participant has a randomisation date (RANDDT; enrolment is staggered over eight months).
Some participants stop treatment (DISCDY, with a reason in DCTREAS); some of those stay in the
study and are still measured (retrieved data, whose benefit fades), the others leave with a
reason (DCSREAS).
A few start rescue medication (RESCDY).  Visit days are jittered around their targets and a
few unscheduled visits fall inside the windows so that windowing has to choose.

Everything is drawn from one numpy Generator seeded through SeedSequence: the same seed
gives the same data on any machine with the same numpy.
"""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from trialcut.data import simulate_events

STUDY_ID = "LVT-201"
PARAMCD = "FBS"
PARAM = "Fatigue Burden Score"
ARMS = ("Placebo", "Lorvatide 10 mg", "Lorvatide 20 mg")
STRATA = ("Mild", "Severe")
# label, AVISITN, target day, half-width of the window (the demo plan's schedule)
SCHEDULE = (("Week 2", 1, 15, 4), ("Week 4", 2, 29, 6), ("Week 8", 3, 57, 10), ("Week 12", 4, 85, 10))
REASONS = ("Adverse event", "Lack of efficacy", "Withdrawal by subject", "Lost to follow-up")
# Why treatment stopped (DCTREAS); the study-leaving reason (DCSREAS) follows from it.
TREATMENT_REASONS = ("Adverse event", "Lack of efficacy", "Other")
COLUMNS = ["USUBJID", "STUDYID", "PARAMCD", "PARAM", "TRT01P", "STRAT1R", "SEX", "AGE", "FASFL", "PPROTFL",
           "RANDDT", "AVISIT", "AVISITN", "ADY", "ABLFL", "AVAL", "BASE", "CHG", "DISCDY", "RESCDY", "DCTREAS",
           "DCSREAS"]
# Calendar day 0 of the invented trial: the first randomisation.
FIRST_RANDOMISATION = dt.date(2025, 1, 6)
# Extra mean change by week 12 over placebo, per arm (placebo itself improves a little).
ARM_EFFECT = {"Placebo": 0.0, "Lorvatide 10 mg": -3.0, "Lorvatide 20 mg": -6.0}
PLACEBO_CHANGE = -2.5
ERROR_SD, PARTICIPANT_SD, CORRELATION_DAYS = 4.0, 3.0, 40.0


def simulate_trial(seed: int = 20240101, n_participants: int = 300, enrolment_days: int = 240,
                   cut_day: float | None = None, events: bool = False) -> pd.DataFrame:
    """One long record per participant and visit (baseline included), ADaM-like column names.

    ``cut_day``: calendar day (day 0 = first randomisation) of a data cut; records after it
    and events not yet happened are left out, and late enrollees have fewer visits.
    """
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    people = _participants(rng, n_participants, enrolment_days)
    records = [_records_of(rng, person) for person in people]
    frame = pd.DataFrame([r for rs in records for r in rs], columns=COLUMNS + ["__calendar"])
    if events:   # the demo's count endpoint (trialcut.data.simulate_events), from its own random stream
        frame = simulate_events.with_event_records(frame, seed)
    if cut_day is not None:
        frame = _apply_cut(frame, people, cut_day)
    return frame.drop(columns="__calendar").reset_index(drop=True)


def write_csv(frame: pd.DataFrame, path) -> None:
    """Write a simulated cut as CSV with whole numbers printed without a trailing ".0"."""
    frame.to_csv(path, index=False, float_format="%.10g", lineterminator="\n")


def demo_cuts(seed: int = 20240101, n_participants: int = 300) -> dict[str, pd.DataFrame]:
    """``interim`` at about 60 % of the calendar follow-up, and ``final``, from one trial."""
    enrolment_days = 240
    total = enrolment_days + SCHEDULE[-1][2] + SCHEDULE[-1][3]
    return {"interim": simulate_trial(seed, n_participants, enrolment_days, cut_day=_interim_day(total), events=True),
            "final": simulate_trial(seed, n_participants, enrolment_days, events=True)}


def demo_cut_offs(enrolment_days: int = 240) -> dict[str, dt.date]:
    """The database cut-off of each demo cut: the interim's cut day, and a week after the last visit."""
    total = enrolment_days + SCHEDULE[-1][2] + SCHEDULE[-1][3]
    return {"interim": calendar_date(_interim_day(total)), "final": calendar_date(total + 7)}


def calendar_date(day: float) -> dt.date:
    """The date of calendar day ``day`` (day 0 = the first randomisation)."""
    return FIRST_RANDOMISATION + dt.timedelta(days=int(np.floor(day)))


def _interim_day(total: float) -> float:
    return float(np.floor(0.6 * total))


# --------------------------------------------------------------------------- participants
def _participants(rng: np.random.Generator, n: int, enrolment_days: int) -> list[dict]:
    start = np.sort(rng.uniform(0, enrolment_days, n)).round()
    strata = rng.choice(STRATA, size=n, p=[0.6, 0.4])
    arms = _stratified_blocks(rng, strata)
    people = []
    for i in range(n):
        severe = strata[i] == "Severe"
        baseline = int(np.clip(round(rng.normal(38 + (4 if severe else -2), 8)), 0, 60))
        people.append({"id": f"{STUDY_ID}-{i + 1:04d}", "start": float(start[i]), "arm": arms[i],
                       "stratum": str(strata[i]), "sex": str(rng.choice(["F", "M"], p=[0.55, 0.45])),
                       "age": int(np.clip(round(rng.normal(52, 12)), 18, 80)), "baseline": baseline,
                       **_course(rng, arms[i])})
    return people


def _stratified_blocks(rng: np.random.Generator, strata: np.ndarray) -> list[str]:
    """Permuted blocks of six (two of each arm) within each stratum: a 1:1:1 allocation."""
    arms = [""] * len(strata)
    for stratum in STRATA:
        members = np.flatnonzero(strata == stratum)
        blocks = int(np.ceil(len(members) / 6))
        sequence = np.concatenate([rng.permutation(np.repeat(ARMS, 2)) for _ in range(blocks)])
        for slot, member in enumerate(members):
            arms[member] = str(sequence[slot])
    return arms


def _course(rng: np.random.Generator, arm: str) -> dict:
    """Treatment stop, leaving the study, rescue and analysis flags of one participant."""
    stop_risk = {"Placebo": 0.16, "Lorvatide 10 mg": 0.14, "Lorvatide 20 mg": 0.20}[arm]
    course = {"discday": None, "leaves": False, "reason": None, "treatment_reason": None, "rescday": None,
              "fas": "Y" if rng.uniform() > 0.01 else "N", "pp": "Y" if rng.uniform() > 0.08 else "N"}
    if rng.uniform() < stop_risk:
        course["discday"] = int(rng.integers(5, 84))
        reason_weights = {"Placebo": [0.15, 0.45, 0.25, 0.15], "Lorvatide 10 mg": [0.35, 0.2, 0.3, 0.15],
                          "Lorvatide 20 mg": [0.55, 0.1, 0.2, 0.15]}[arm]
        reason = str(rng.choice(REASONS, p=reason_weights))
        course["treatment_reason"] = reason if reason in TREATMENT_REASONS else "Other"
        # About four in ten who stop treatment stay and are measured (retrieved data).
        if rng.uniform() < 0.6:
            course["leaves"] = True
            course["reason"] = reason
        if course["discday"] < 57:
            course["pp"] = "N"
    if rng.uniform() < 0.06:
        course["rescday"] = int(rng.integers(20, 80))
    return course


# --------------------------------------------------------------------------- records
def _visit_days(rng: np.random.Generator) -> list[tuple[str, float, float, bool]]:
    """(label, AVISITN, study day, scheduled?) for each visit, with a few unscheduled extras."""
    visits = []
    for label, number, target, window in SCHEDULE:
        spread = max(1.0, window / 3)
        day = target + int(np.clip(round(rng.normal(0, spread)), -window, window))
        if rng.uniform() < 0.01:          # now and then a visit comes too late for its window
            day = target + window + int(rng.integers(1, 4))
        visits.append((label, float(number), float(day), True))
        if rng.uniform() < 0.06:
            extra = day + int(rng.choice([-2, -1, 1, 2]))
            visits.append(("Unscheduled", np.nan, float(extra), False))
    return visits


def _mean_change(arm: str, day: float, baseline: float, person: dict) -> float:
    fraction = min(day / 85.0, 1.2)
    shape = 1 - np.exp(-3 * fraction)                     # most of the effect early on
    effect = ARM_EFFECT[arm] * shape / (1 - np.exp(-3))
    if person["discday"] is not None and day > person["discday"]:
        # Off treatment the benefit fades over about a month.
        effect *= np.exp(-(day - person["discday"]) / 30.0)
    rescue = -3.0 if person["rescday"] is not None and day > person["rescday"] else 0.0
    return PLACEBO_CHANGE * fraction + effect + rescue - 0.15 * (baseline - 38)


def _records_of(rng: np.random.Generator, person: dict) -> list[list]:
    visits = _visit_days(rng)
    if person["leaves"]:
        visits = [v for v in visits if v[2] <= person["discday"]]
    days = np.array([v[2] for v in visits])
    covariance = ERROR_SD ** 2 * np.exp(-np.abs(days[:, None] - days[None, :]) / CORRELATION_DAYS)
    errors = rng.multivariate_normal(np.zeros(len(days)), covariance) if len(days) else days
    shift = rng.normal(0, PARTICIPANT_SD)
    base_day = float(1 - rng.integers(0, 4))
    shared = _shared_columns(person)
    rows = [[*shared[:11], "Baseline", 0.0, base_day, "Y", float(person["baseline"]), float(person["baseline"]),
             np.nan, *shared[11:], person["start"] + base_day - 1]]
    for (label, number, day, _), error in zip(visits, errors):
        mean = person["baseline"] + _mean_change(person["arm"], day, person["baseline"], person)
        value = float(np.clip(round(mean + shift + error), 0, 60))
        rows.append([*shared[:11], label, number, day, None, value, float(person["baseline"]),
                     value - person["baseline"], *shared[11:], person["start"] + day - 1])
    return rows


def _shared_columns(person: dict) -> list:
    return [person["id"], STUDY_ID, PARAMCD, PARAM, person["arm"], person["stratum"], person["sex"],
            person["age"], person["fas"], person["pp"], calendar_date(person["start"]).isoformat(),
            _float_or_nan(person["discday"]), _float_or_nan(person["rescday"]), person["treatment_reason"],
            person["reason"]]


def _float_or_nan(value) -> float:
    return float(value) if value is not None else np.nan


def _apply_cut(frame: pd.DataFrame, people: list[dict], cut_day: float) -> pd.DataFrame:
    """Keep what was known on the cut date: records up to it, events that had happened."""
    start = {p["id"]: p["start"] for p in people}
    # Participants randomised after the cut-off are not in the cut, even if screened before it.
    frame = frame[(frame["__calendar"] <= cut_day) & (frame["USUBJID"].map(start) <= cut_day)].copy()
    calendar_of = frame["USUBJID"].map(start) - 1
    for column in ("DISCDY", "RESCDY"):
        not_yet = frame[column].notna() & (calendar_of + frame[column] > cut_day)
        frame.loc[not_yet, column] = np.nan
    for column in ("DCSREAS", "DCTREAS"):
        frame.loc[frame["DISCDY"].isna() & frame[column].notna(), column] = None
    return frame
