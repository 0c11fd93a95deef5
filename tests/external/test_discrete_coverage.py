"""Coverage of the 95% intervals for the risk difference and the rate ratio (seeded simulation).

1,000 small simulated two-arm trials each.  The truth is computed, not typed in: the marginal
risk difference of a logistic model with a normal covariate by Gauss-Hermite quadrature, and
the rate ratio is the one used to simulate.  A correct 95% interval covers the truth in
93-97% of 1,000 trials (the binomial spread of a 95% coverage estimate is about 0.7 points;
93-97 is about three spreads either side; common practice).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from trialcut import fit_rate
from trialcut.stats.proportions import standardised_difference

TRIALS = 1000
INTERCEPT, ARM_EFFECT, COVARIATE_EFFECT = -0.3, 0.7, 0.8


def _true_risk_difference() -> float:
    nodes, weights = np.polynomial.hermite_e.hermegauss(60)      # expectation over x ~ N(0, 1)
    weights = weights / weights.sum()
    expit = lambda eta: 1 / (1 + np.exp(-eta))                    # noqa: E731
    return float(np.sum(weights * (expit(INTERCEPT + ARM_EFFECT + COVARIATE_EFFECT * nodes)
                                   - expit(INTERCEPT + COVARIATE_EFFECT * nodes))))


@pytest.mark.slow
@pytest.mark.parametrize("seed", [2024])
def test_standardised_risk_difference_interval_covers(seed):
    rng = np.random.default_rng(seed)
    truth, size, covered = _true_risk_difference(), 120, 0
    arm = np.repeat([0.0, 1.0], size // 2)
    for _ in range(TRIALS):
        x = rng.normal(size=size)
        y = (rng.random(size) < 1 / (1 + np.exp(-(INTERCEPT + ARM_EFFECT * arm + COVARIATE_EFFECT * x)))).astype(float)
        estimate, se = standardised_difference(y, np.column_stack([np.ones(size), arm, x]))
        covered += abs(estimate - truth) <= 1.959964 * se
    assert 0.93 <= covered / TRIALS <= 0.97, f"seed {seed}: coverage {covered / TRIALS:.3f}"


@pytest.mark.slow
@pytest.mark.parametrize("seed", [2025])
def test_negative_binomial_rate_ratio_interval_covers(seed):
    rng = np.random.default_rng(seed)
    ratio, base_rate, dispersion, size, covered = 0.7, 2.0, 0.5, 200, 0
    arm = np.repeat(["control", "active"], size // 2)
    for _ in range(TRIALS):
        exposure = rng.uniform(0.5, 1.5, size)
        mean = base_rate * exposure * np.where(arm == "active", ratio, 1.0)
        # negative binomial as a gamma mixture of Poissons: variance mean + dispersion * mean^2
        counts = rng.poisson(mean * rng.gamma(1 / dispersion, dispersion, size))
        fit = fit_rate(pd.DataFrame({"events": counts, "arm": arm, "years": exposure}), outcome="events", arm="arm",
                       reference="control", exposure="years")
        row = fit.differences("rate_ratio").iloc[0]
        covered += row["lower"] <= ratio <= row["upper"]
    assert 0.93 <= covered / TRIALS <= 0.97, f"seed {seed}: coverage {covered / TRIALS:.3f}"
