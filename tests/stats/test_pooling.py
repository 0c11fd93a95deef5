"""Rubin's rules with the Barnard–Rubin df: identities of the formulas and their limits.

Sources: Rubin (1987, Multiple Imputation for Nonresponse in Surveys, ch. 3) for Q̄, Ū, B,
T, r, λ and ν_old; Barnard & Rubin (1999, Biometrika 86:948–955) for ν_obs and the
combined ν, whose stated properties are checked here (ν ≤ ν_com, ν → ν_old as ν_com → ∞).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from trialcut.errors import ModelSpecificationError
from trialcut.stats.pooling import rubin_pool

ESTIMATES = [1.2, 0.9, 1.5, 1.1, 1.3]
VARIANCES = [0.20, 0.22, 0.18, 0.21, 0.19]


def test_hand_computed_rubin_quantities():
    # Rubin 1987 ch. 3, computed here step by step with plain Python arithmetic.
    m = 5
    q_bar = sum(ESTIMATES) / m
    u_bar = sum(VARIANCES) / m
    b = sum((q - q_bar) ** 2 for q in ESTIMATES) / (m - 1)
    total = u_bar + (1 + 1 / m) * b
    lam = (1 + 1 / m) * b / total
    nu_old = (m - 1) / lam**2
    pooled = rubin_pool(ESTIMATES, VARIANCES)
    assert pooled.estimate == pytest.approx(q_bar, rel=1e-14)
    assert pooled.total_variance == pytest.approx(total, rel=1e-14)
    assert pooled.std_error == pytest.approx(math.sqrt(total), rel=1e-14)
    assert pooled.df == pytest.approx(nu_old, rel=1e-12)
    assert pooled.p == pytest.approx(2 * stats.t.sf(q_bar / math.sqrt(total), nu_old), rel=1e-10)
    half = stats.t.ppf(0.975, nu_old) * math.sqrt(total)
    assert (pooled.lower, pooled.upper) == pytest.approx((q_bar - half, q_bar + half), rel=1e-12)


def test_barnard_rubin_df_properties():
    # Barnard & Rubin 1999: the adjusted df never exceeds the complete-data df and tends to
    # Rubin's ν_old when the complete-data df grows without bound.
    small = rubin_pool(ESTIMATES, VARIANCES, complete_df=20)
    assert small.df < 20
    assert small.df < rubin_pool(ESTIMATES, VARIANCES).df
    huge = rubin_pool(ESTIMATES, VARIANCES, complete_df=1e12)
    assert huge.df == pytest.approx(rubin_pool(ESTIMATES, VARIANCES).df, rel=1e-6)
    lam = small.proportion_due_to_missing
    nu_obs = 21 / 23 * 20 * (1 - lam)
    nu_old = 4 / lam**2
    assert small.df == pytest.approx(1 / (1 / nu_old + 1 / nu_obs), rel=1e-12)


def test_fraction_of_missing_information_and_efficiency():
    # Rubin 1987: γ = (r + 2/(ν + 3))/(r + 1) and relative efficiency (1 + γ/m)⁻¹.
    pooled = rubin_pool(ESTIMATES, VARIANCES, complete_df=50)
    r = pooled.relative_increase
    assert pooled.fraction_missing_information == pytest.approx((r + 2 / (pooled.df + 3)) / (r + 1), rel=1e-12)
    assert pooled.relative_efficiency == pytest.approx(1 / (1 + pooled.fraction_missing_information / 5))
    assert 0 < pooled.proportion_due_to_missing < pooled.fraction_missing_information < 1


def test_identical_analyses_are_the_complete_data_analysis():
    # Common practice: with nothing imputed the pooled analysis is the single analysis.
    pooled = rubin_pool([2.0] * 4, [0.25] * 4, complete_df=30)
    assert (pooled.estimate, pooled.std_error, pooled.df) == (2.0, 0.5, 30.0)
    assert pooled.p == pytest.approx(2 * stats.t.sf(4.0, 30), rel=1e-12)
    assert pooled.fraction_missing_information == 0.0 and pooled.relative_efficiency == 1.0


@pytest.mark.parametrize("seed", range(5))
def test_more_between_variance_means_fewer_df(seed):
    rng = np.random.default_rng(seed)
    base = rng.normal(size=10)
    narrow = rubin_pool(base * 0.1, np.full(10, 1.0), complete_df=100)
    wide = rubin_pool(base * 1.0, np.full(10, 1.0), complete_df=100)
    assert wide.df < narrow.df, f"seed {seed}"
    assert wide.std_error > narrow.std_error, f"seed {seed}"


def test_to_dict_is_json_and_infinity_is_spelled():
    pooled = rubin_pool([1.0, 1.0], [0.1, 0.1])
    record = pooled.to_dict()
    json.dumps(record, allow_nan=False)
    assert record["df"] == "inf" and float(record["df"]) == math.inf


@pytest.mark.parametrize("estimates, variances, complete_df", [
    ([1.0], [0.1], None), ([1.0, 2.0], [0.1], None), ([1.0, np.nan], [0.1, 0.1], None),
    ([1.0, 2.0], [0.1, -0.1], None), ([1.0, 2.0], [0.1, 0.1], 0)])
def test_bad_input_is_refused(estimates, variances, complete_df):
    with pytest.raises(ModelSpecificationError):
        rubin_pool(estimates, variances, complete_df=complete_df)
