"""Invented event counts for the demo trial: episodes of severe fatigue ("crashes").

For every participant of the simulated cut (:mod:`trialcut.data.simulate`) a second
parameter, ``CRASH``, gets one record per visit the fatigue score has: at baseline the number
of episodes in the four weeks before randomisation, and at each later visit the number since
the previous visit, with ``EXPWK`` the weeks at risk that record covers (so the exposure
differs between participants and visits).  Counts are negative binomial (a gamma-distributed
personal rate times a Poisson count), lower on lorvatide.  A separate random stream is used,
so the fatigue scores are the same with or without the events.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

EVENT_PARAMCD = "CRASH"
EVENT_PARAM = "Episodes of severe fatigue (invented)"
EXPOSURE = "EXPWK"
WEEKLY_RATE = 0.35
RATE_RATIO = {"Placebo": 1.0, "Lorvatide 10 mg": 0.8, "Lorvatide 20 mg": 0.6}
GAMMA_SHAPE = 2.0
BASELINE_WEEKS = 4.0


def with_event_records(frame: pd.DataFrame, seed: int) -> pd.DataFrame:
    """``frame`` (one fatigue-score record per participant and visit) plus the CRASH records."""
    rng = np.random.default_rng(np.random.SeedSequence([seed, 12]))
    scores = frame.assign(**{EXPOSURE: np.nan})
    events = []
    for _, records in scores.groupby("USUBJID", sort=False):
        events.append(_participant_events(rng, records))
    combined = pd.concat([scores, *events], ignore_index=True)
    order = {subject: position for position, subject in enumerate(pd.unique(scores["USUBJID"]))}
    return combined.sort_values("USUBJID", key=lambda s: s.map(order), kind="stable").reset_index(drop=True)


def _participant_events(rng: np.random.Generator, records: pd.DataFrame) -> pd.DataFrame:
    records = records.sort_values("ADY", kind="stable")
    personal = rng.gamma(GAMMA_SHAPE, 1.0 / GAMMA_SHAPE)
    arm = records["TRT01P"].iloc[0]
    rows = records.copy()
    rows["PARAMCD"], rows["PARAM"] = EVENT_PARAMCD, EVENT_PARAM
    baseline_count = float(rng.poisson(WEEKLY_RATE * personal * BASELINE_WEEKS))
    previous_day, counts, weeks = 1.0, [], []
    for is_baseline, day in zip(records["ABLFL"].eq("Y"), records["ADY"].astype(float)):
        if is_baseline:
            counts.append(baseline_count)
            weeks.append(BASELINE_WEEKS)
            continue
        at_risk = max(day - previous_day, 1.0) / 7.0
        previous_day = day
        counts.append(float(rng.poisson(WEEKLY_RATE * personal * RATE_RATIO.get(arm, 1.0) * at_risk)))
        weeks.append(round(at_risk, 4))
    rows["AVAL"] = counts
    rows["BASE"] = baseline_count
    rows["CHG"] = np.where(records["ABLFL"].eq("Y"), np.nan, np.array(counts) - baseline_count)
    rows[EXPOSURE] = weeks
    return rows
