"""Timing and memory of the repeated-measures engine against statsmodels, in one process.

Data (invented here, fixed seed): three arms, six visits, a baseline covariate, 30% of
participants drop out (monotone) at a random visit after the first.  The mean model is
arm, visit, arm x visit and baseline.

Figures:
(a) compound symmetry by REML: our fit vs statsmodels MixedLM with a random intercept
    (the same model), time ratio, and the largest difference in the arm-by-visit contrasts;
(b) unstructured REML with Kenward-Roger vs that MixedLM fit: time ratio;
(c) unstructured REML with Kenward-Roger on 60,000 participants: time and peak memory
    (measured in a fresh subprocess, so the peak is the fit's own), and the time ratio
    60,000 vs 6,000 participants.
"""
from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

ARMS = ("Placebo", "Low dose", "High dose")
VISITS = ("Week 2", "Week 4", "Week 8", "Week 12", "Week 16", "Week 24")
SEED = 20261202
N_SUBJECTS = 600
LARGE, SMALL = 60_000, 6_000
REPEATS = 3
GIB = 1024**3


def simulate(n_subjects: int, seed: int = SEED) -> pd.DataFrame:
    """One row per participant and visit; CHG is NaN after dropout."""
    rng = np.random.default_rng(seed)
    k = len(VISITS)
    arm_codes = np.arange(n_subjects) % len(ARMS)
    baseline = rng.normal(24.0, 5.0, n_subjects)
    lags = np.abs(np.subtract.outer(np.arange(k), np.arange(k)))
    sd = np.linspace(4.0, 7.0, k)
    sigma = (0.3 + 0.6 * 0.7**lags) * np.where(lags == 0, 1 / 0.9, 1.0) * np.outer(sd, sd)
    effect = np.outer([0.0, -1.5, -3.0], np.linspace(0.2, 1.0, k))
    change = (-2.0 * np.linspace(0.5, 1.5, k) + effect[arm_codes] + 0.3 * (baseline[:, None] - 24.0)
              + rng.multivariate_normal(np.zeros(k), sigma, size=n_subjects))
    drops = rng.random(n_subjects) < 0.30
    first_missing = np.where(drops, rng.integers(1, k, n_subjects), k)
    change[np.arange(k)[None, :] >= first_missing[:, None]] = np.nan
    return pd.DataFrame({
        "USUBJID": np.repeat([f"S{i:06d}" for i in range(n_subjects)], k),
        "TRT01P": np.repeat(np.asarray(ARMS)[arm_codes], k),
        "AVISIT": np.tile(VISITS, n_subjects),
        "BASE": np.repeat(baseline, k),
        "CHG": change.ravel(),
    })


def fit_ours(data: pd.DataFrame, covariance: str, df: str):
    import trialcut as tc

    return tc.fit_mmrm(data, outcome="CHG", subject="USUBJID", visit="AVISIT", arm="TRT01P",
                       reference=ARMS[0], visits=VISITS, covariates=("BASE",),
                       covariance=covariance, method="reml", df=df)


def mixed_design(frame: pd.DataFrame) -> np.ndarray:
    """Cell means for arm x visit plus the baseline slope (full rank, no intercept)."""
    cells = [((frame.TRT01P == a) & (frame.AVISIT == v)).to_numpy(float) for a in ARMS for v in VISITS]
    return np.column_stack([*cells, frame.BASE.to_numpy(float)])


def fit_mixedlm(data: pd.DataFrame):
    """statsmodels MixedLM, random intercept per participant, REML (design built beforehand
    is part of the timed work, as ours builds its own)."""
    import statsmodels.api as sm

    observed = data.dropna(subset=["CHG"])
    model = sm.MixedLM(observed.CHG.to_numpy(float), mixed_design(observed),
                       groups=observed.USUBJID.to_numpy())
    return model.fit(reml=True)


def best_time(function, *args, repeats: int = REPEATS):
    best, result = float("inf"), None
    for _ in range(repeats):
        start = time.perf_counter()
        result = function(*args)
        best = min(best, time.perf_counter() - start)
    return best, result


def contrast_gap(ours, mixed) -> float:
    """Largest absolute difference between the arm-minus-placebo differences at each visit."""
    beta = np.asarray(mixed.fe_params)
    k = len(VISITS)
    gaps = []
    differences = ours.differences().set_index(["arm", "visit"])
    for a, arm in enumerate(ARMS[1:], start=1):
        for v, visit in enumerate(VISITS):
            reference_value = beta[a * k + v] - beta[v]
            gaps.append(abs(differences.loc[(arm, visit), "estimate"] - reference_value))
    return float(max(gaps))


def large_fit_in_subprocess() -> dict:
    """Time 6,000 and 60,000 participants in a fresh interpreter; report its peak RSS."""
    script = (
        "import json, resource, sys, time\n"
        f"sys.path.insert(0, {str(Path(__file__).parent)!r})\n"
        "import bench_mmrm as b\n"
        "out = {}\n"
        f"for n in ({SMALL}, {LARGE}):\n"
        "    data = b.simulate(n)\n"
        "    repeats = 2 if n < 50000 else 1\n"
        "    out[str(n)], fit = b.best_time(b.fit_ours, data, 'unstructured', 'kenward_roger', repeats=repeats)\n"
        "    out['converged_' + str(n)] = bool(fit.converged)\n"
        "out['max_rss_bytes'] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024\n"
        "print(json.dumps(out))\n"
    )
    completed = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    return json.loads(completed.stdout.strip().splitlines()[-1])


def _row(figure, value, unit, target, passed, detail=""):
    return {"benchmark": "mmrm", "figure": figure, "value": value, "unit": unit,
            "target": target, "passed": bool(passed), "detail": detail}


def run() -> list[dict]:
    data = simulate(N_SUBJECTS)
    rows = []
    fit_ours(data, "compound_symmetry", "satterthwaite")  # warm imports and caches
    ours_cs_time, ours_cs = best_time(fit_ours, data, "compound_symmetry", "satterthwaite")
    mixed_time, mixed = best_time(fit_mixedlm, data)
    speedup = mixed_time / ours_cs_time
    rows.append(_row("compound symmetry REML: MixedLM time / ours", speedup, "x", ">= 10",
                     speedup >= 10, f"ours {ours_cs_time:.3f} s, MixedLM {mixed_time:.3f} s, "
                     f"{N_SUBJECTS} participants x {len(VISITS)} visits"))
    gap = contrast_gap(ours_cs, mixed)
    rows.append(_row("compound symmetry: largest difference in arm-by-visit contrasts vs MixedLM",
                     gap, "outcome units", "<= 1e-4", gap <= 1e-4,
                     f"loglik ours {ours_cs.loglik:.6f}, MixedLM {mixed.llf:.6f}"))
    us_time, us_fit = best_time(fit_ours, data, "unstructured", "kenward_roger")
    ratio = us_time / mixed_time
    rows.append(_row("unstructured REML + Kenward-Roger time / MixedLM compound symmetry time",
                     ratio, "x", "<= 0.5", ratio <= 0.5 and us_fit.converged,
                     f"ours {us_time:.3f} s, MixedLM {mixed_time:.3f} s"))
    large = large_fit_in_subprocess()
    large_time, small_time = large[str(LARGE)], large[str(SMALL)]
    rows.append(_row(f"unstructured REML + Kenward-Roger, {LARGE:,} x {len(VISITS)}: time",
                     large_time, "s", "< 30", large_time < 30 and large[f"converged_{LARGE}"]))
    rows.append(_row(f"unstructured REML + Kenward-Roger, {LARGE:,} x {len(VISITS)}: peak memory",
                     large["max_rss_bytes"] / GIB, "GiB", "< 2", large["max_rss_bytes"] < 2 * GIB,
                     "peak resident set of a fresh interpreter (imports, data and fit)"))
    scaling = large_time / small_time
    rows.append(_row(f"time {LARGE:,} / time {SMALL:,} participants", scaling, "x", "<= 12",
                     scaling <= 12, f"{SMALL:,}: {small_time:.2f} s (best of 2)"))
    return rows
