"""Simulated trials for the imputation tests (invented numbers, generated here, not data).

The checks in the test files compare the imputation against textbook identities and
independent computations; this module only draws data with a known structure.
"""
from __future__ import annotations

import numpy as np
import pandas as pd


def simulate_trial(seed: int, *, n_per_arm: int = 60, visits: int = 3, effect_per_visit: float = 1.0,
                   correlation: float = 0.6, dropout: float = 0.25, intermittent: float = 0.0,
                   arms: tuple[str, ...] = ("placebo", "active"), baseline_slope: float = 0.5) -> pd.DataFrame:
    """Long frame: one row per participant × visit, NaN after dropout, ``event`` true from the
    visit of dropout on; the active arms' mean grows by ``effect_per_visit`` per visit."""
    rng = np.random.default_rng(seed)
    labels = [f"week{2 * (j + 1)}" for j in range(visits)]
    lags = np.abs(np.subtract.outer(np.arange(visits), np.arange(visits)))
    sigma = 4.0 * correlation ** lags
    rows = []
    for k, arm in enumerate(arms):
        baseline = rng.normal(20.0, 3.0, n_per_arm)
        means = -0.5 * np.arange(1, visits + 1) - k * effect_per_visit * np.arange(1, visits + 1)
        values = means + baseline_slope * (baseline - 20.0)[:, None] + rng.multivariate_normal(
            np.zeros(visits), sigma, n_per_arm)
        leave = np.where(rng.random(n_per_arm) < dropout, rng.integers(1, visits, n_per_arm), visits)
        for i in range(n_per_arm):
            for j in range(visits):
                after = j >= leave[i]
                gap = (not after) and j > 0 and rng.random() < intermittent
                rows.append({"USUBJID": f"{arm}-{i:03d}", "TRT01P": arm, "AVISIT": labels[j],
                             "BASE": baseline[i], "CHG": np.nan if (after or gap) else values[i, j],
                             "event": bool(after)})
    return pd.DataFrame(rows)


ROLES = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT", outcome="CHG")
