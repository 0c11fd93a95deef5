"""Rubin's rules against statsmodels' own combining step.

statsmodels.imputation.bayes_mi.MI combines its analyses with Rubin's rules: the mean of
the estimates, covariance Ū + (1 + 1/m)B and a "fraction of missing information" computed
as (1 + 1/m)B/T, which is our λ (it has no df correction, so it is compared with λ, not γ).
Its combining helper does not use the instance, so it is called with a placeholder.  The
Barnard–Rubin df has no statsmodels counterpart; its identities are in tests/stats/test_pooling.py.
"""
from __future__ import annotations

import numpy as np
import pytest
from statsmodels.imputation.bayes_mi import MI

from trialcut.stats.pooling import rubin_pool


@pytest.mark.parametrize("seed", range(4))
def test_matches_statsmodels_combining(seed):
    rng = np.random.default_rng(seed)
    m = int(rng.integers(3, 30))
    estimates = rng.normal(1.0, 0.3, m)
    variances = rng.uniform(0.05, 0.2, m)
    params, covariance, fmi = MI._combine(None, estimates[:, None], [np.array([[v]]) for v in variances])
    pooled = rubin_pool(estimates, variances, complete_df=80)
    assert pooled.estimate == pytest.approx(float(params[0]), rel=1e-13), f"seed {seed}"
    assert pooled.total_variance == pytest.approx(float(covariance[0, 0]), rel=1e-13), f"seed {seed}"
    assert pooled.proportion_due_to_missing == pytest.approx(float(fmi[0]), rel=1e-12), f"seed {seed}"
