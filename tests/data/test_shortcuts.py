"""Shortcuts taken for speed (issue 13) must agree with the general route they skip.

Each test runs the same seeded inputs through the shortcut and through the general route
(forced) and requires identical output; seeds cover a range and are printed on failure.
"""
import datetime as dt

import numpy as np
import pandas as pd
import pytest

from trialcut.data import windowing
from trialcut.data.cutoff import _extreme_record_dates, _record_dates

WINDOWS = (windowing.Window("Week 2", 15, 3), windowing.Window("Week 4", 29, 7),
           windowing.Window("Week 8", 57, 7), windowing.Window("Week 12", 85, 14))


@pytest.mark.parametrize("seed", range(10))
def test_visit_windows_without_repeats_match_the_general_route(seed, monkeypatch):
    rng = np.random.default_rng(seed)
    shortcut_taken = 0
    for _ in range(50):
        size = int(rng.integers(0, 20))
        participants = rng.permutation(np.repeat(np.arange(6), 4))[:size]
        days = pd.Series(rng.choice([15, 29, 57, 85, 200, np.nan, 16, 30, -3], size).astype(float),
                         index=rng.permutation(size) + 10)
        ids = pd.Series([f"P{p}" for p in participants], index=days.index)
        parameters = None if rng.random() < 0.5 else pd.Series(rng.choice(["A", "B"], size), index=days.index)
        shortcut_taken += not windowing._any_visit_repeated(ids, parameters, windowing._windows_of(
            days.to_numpy(dtype=float), WINDOWS))
        fast = windowing.assign_visits(days, ids, WINDOWS, parameters)
        with monkeypatch.context() as patched:
            patched.setattr(windowing, "_any_visit_repeated", lambda *args: True)
            general = windowing.assign_visits(days, ids, WINDOWS, parameters)
        try:
            pd.testing.assert_series_equal(fast.visit, general.visit)
            pd.testing.assert_series_equal(fast.chosen, general.chosen)
            assert fast.log == general.log
        except AssertionError as error:
            raise AssertionError(f"seed {seed}, days {days.tolist()}: {error}") from None
    assert shortcut_taken, f"seed {seed}: the shortcut was never taken"


@pytest.mark.parametrize("seed", range(10))
def test_earliest_and_latest_record_dates_match_every_record(seed):
    rng = np.random.default_rng(seed)
    for _ in range(200):
        size = int(rng.integers(1, 15))
        starts = pd.Series([dt.date(2020, 1, 1) + dt.timedelta(days=int(d)) for d in rng.integers(0, 400, size)])
        whole = rng.random() < 0.7
        days = pd.Series(rng.integers(-30, 200, size).astype(float) if whole else np.round(rng.normal(40, 30, size), 2))
        every = _record_dates(list(starts), days.to_numpy(dtype=float))
        extremes = _extreme_record_dates(starts, days)
        assert (min(extremes), max(extremes)) == (min(every), max(every)), f"seed {seed}: {days.tolist()}"


def test_dates_out_of_range_fail_as_record_by_record():
    starts = pd.Series([dt.date(2020, 1, 1)] * 3)
    days = pd.Series([1e7, 15.0, -1e9])      # the first record leaves the calendar first
    with pytest.raises(OverflowError, match="date value out of range"):
        _extreme_record_dates(starts, days)


def _random_column(rng, size, kind):
    if kind == 0:
        return pd.Series(rng.choice([1.0, 2.0, np.nan, -0.0, 0.0], size))
    if kind == 1:
        return pd.Series([None if r < .2 else ("Y" if r < .6 else "N") for r in rng.random(size)], dtype="str")
    if kind == 2:
        return pd.Series([None if r < .2 else ("Y" if r < .6 else "N") for r in rng.random(size)], dtype=object)
    if kind == 3:
        return pd.Series(rng.random(size) < .5)
    return pd.Series(rng.integers(0, 3, size))


@pytest.mark.parametrize("seed", range(10))
def test_varying_within_participant_on_codes_matches_groupby(seed):
    from trialcut.data.conformance import _varies_on_codes

    rng = np.random.default_rng(seed)
    decided = 0
    for trial in range(200):
        size = int(rng.integers(0, 25))
        ids = pd.Series([f"P{i}" if rng.random() > 0.02 else None for i in rng.integers(0, 5, size)],
                        dtype=rng.choice(["str", object]), name="USUBJID")
        frame = pd.DataFrame({"USUBJID": ids, "value": _random_column(rng, size, trial % 5)})
        counts = frame.groupby("USUBJID", dropna=True)["value"].nunique(dropna=False)   # the general route
        expected = frame["USUBJID"].isin(counts[counts > 1].index)
        found = _varies_on_codes(frame["USUBJID"], frame["value"])
        if found is not None:
            decided += 1
            try:
                pd.testing.assert_series_equal(found, expected)
            except AssertionError as error:
                raise AssertionError(f"seed {seed}, trial {trial}: {frame.to_dict('list')}: {error}") from None
    assert decided > 50, f"seed {seed}: the shortcut decided only {decided} columns"
