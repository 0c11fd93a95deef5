"""Tipping-point grid: δ = 0 is the MAR analysis, every cell is the δ-adjusted analysis of
the same imputations, estimates move monotonically with δ, and the tipping point is the
linear interpolation of p at α (delta-adjusted imputation; Ratitch, O'Kelly & Tosiello 2013)."""
from __future__ import annotations

import numpy as np
import pytest

from tests.stats.test_imputation_support import ROLES, simulate_trial
from trialcut.errors import ModelSpecificationError
from trialcut.stats.imputation import impute
from trialcut.stats.tipping import tipping_point

VISITS = ["week2", "week4", "week6"]
SETTINGS = dict(n_imputations=8, burn_in=10, thinning=2, chains=2)


@pytest.fixture(scope="module")
def trial():
    return simulate_trial(4, n_per_arm=50, visits=3, dropout=0.4, effect_per_visit=0.6)


def _grid(trial, shifts, reference_shifts=None, seed=9, **extra):
    return tipping_point(trial, **ROLES, visits=VISITS, reference="placebo", target_visit="week6", shifts=shifts,
                         reference_shifts=reference_shifts, covariates=("BASE",), event="event",
                         seed_sequence=np.random.SeedSequence(seed), **SETTINGS, **extra)


def _impute(trial, seed=9, **extra):
    return impute(trial, **ROLES, visits=VISITS, reference="placebo", covariates=("BASE",), event="event",
                  seed_sequence=np.random.SeedSequence(seed), **SETTINGS, **extra)


def test_zero_shift_is_the_mar_analysis_and_cells_are_delta_adjusted_analyses(trial):
    result = _grid(trial, [0.0, 1.0, 2.0, 3.0])
    grid = result.grid()
    mar = _impute(trial).differences().set_index("visit").loc["week6"]
    base = grid[grid["active_shift"] == 0.0].iloc[0]
    for column in ("estimate", "se", "df", "p", "lower", "upper"):
        assert base[column] == pytest.approx(mar[column], rel=1e-10), column
    shifted = _impute(trial, delta=2.0, delta_arms=("active",)).differences().set_index("visit").loc["week6"]
    cell = grid[grid["active_shift"] == 2.0].iloc[0]
    assert cell["estimate"] == pytest.approx(shifted["estimate"], rel=1e-10)
    assert cell["p"] == pytest.approx(shifted["p"], rel=1e-8)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_estimates_move_monotonically(trial, seed):
    result = _grid(trial, [-2.0, -1.0, 0.0, 1.0, 2.0], reference_shifts=[-1.0, 0.0, 1.0], seed=seed)
    estimates = result.heat_map("active", value="estimate")
    assert np.all(np.diff(estimates.to_numpy(), axis=1) > 0), seed   # active shift up: difference up
    assert np.all(np.diff(estimates.to_numpy(), axis=0) < 0), seed   # reference shift up: difference down


def test_tipping_point_is_the_interpolated_crossing(trial):
    shifts = list(np.linspace(0.0, 6.0, 13))   # the active arm is better (lower); shifting it up erodes that
    result = _grid(trial, shifts)
    grid = result.grid()
    point = result.points[0]
    assert point.base_significant
    p, delta = grid["p"].to_numpy(), grid["active_shift"].to_numpy()
    flip = np.flatnonzero((p[:-1] < 0.05) != (p[1:] < 0.05))
    assert flip.size >= 1
    i = flip[0]                       # the crossing nearest the base cell δ = 0
    expected = delta[i] + (0.05 - p[i]) * (delta[i + 1] - delta[i]) / (p[i + 1] - p[i])
    assert point.shift == pytest.approx(expected, rel=1e-12)
    assert delta[i] <= point.shift <= delta[i + 1]
    assert "changes at" in point.statement


def test_no_crossing_is_stated(trial):
    result = _grid(trial, [-0.2, 0.0, 0.2])
    point = result.points[0]
    assert point.shift is None and point.crossings == ()
    assert "does not change" in point.statement
    record = result.to_dict()
    assert record["tipping_points"][0]["shift"] is None and len(record["cells"]) == 3


def test_bad_grids_are_refused(trial):
    with pytest.raises(ModelSpecificationError):
        _grid(trial, [1.0])
    with pytest.raises(ModelSpecificationError):
        tipping_point(trial, **ROLES, visits=VISITS, reference="placebo", target_visit="week9", shifts=[0, 1])
