"""The demo's invented event counts (trialcut.data.simulate_events).

Checks are identities of the construction (common practice for a simulator): one CRASH record
beside every fatigue-score record, exposure equal to the days since the previous visit over
seven, CHG = AVAL - BASE, the scores unchanged by adding the events, and crude rates near the
rates simulated (a Poisson-gamma mean over about 300 participant-quarters: loose bounds).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from trialcut.data.simulate import simulate_trial
from trialcut.data.simulate_events import RATE_RATIO, WEEKLY_RATE


def test_events_sit_beside_the_scores_and_leave_them_unchanged():
    with_events = simulate_trial(3, 120, events=True)
    without = simulate_trial(3, 120)
    scores = with_events[with_events["PARAMCD"] == "FBS"][without.columns].reset_index(drop=True)
    pd.testing.assert_frame_equal(scores, without)
    events = with_events[with_events["PARAMCD"] == "CRASH"]
    assert len(events) == len(without)
    post = events[events["ABLFL"] != "Y"]
    assert (post["AVAL"] >= 0).all() and (post["AVAL"] == post["AVAL"].round()).all()
    assert (post["EXPWK"] > 0).all()
    np.testing.assert_allclose(post["CHG"], post["AVAL"] - post["BASE"])
    first = post.sort_values("ADY").groupby("USUBJID").head(1)
    np.testing.assert_allclose(first["EXPWK"], np.maximum(first["ADY"] - 1, 1) / 7, atol=1e-4)


def test_crude_rates_follow_the_simulated_ratio():
    events = simulate_trial(8, 600, events=True).query("PARAMCD == 'CRASH' and ABLFL != 'Y'")
    rates = events.groupby("TRT01P").apply(lambda g: g["AVAL"].sum() / g["EXPWK"].sum())
    assert abs(rates["Placebo"] - WEEKLY_RATE) < 0.08
    assert rates["Lorvatide 20 mg"] / rates["Placebo"] < 0.85 * RATE_RATIO["Placebo"]
