"""Timing of the binary and count analyses against statsmodels called directly, in one process.

Data (invented here, fixed seed):
(a) 600 participants x 6 visits, two arms, a binary response whose log-odds rise over visits
    and with a baseline score, exchangeable within-participant correlation induced by a
    shared random effect; ``fit_gee`` (exchangeable) vs statsmodels' ``GEE`` on the same design
    (the design built with numpy inside the timed call, as ours builds its own);
(b) 6,000 participants, two arms, negative-binomial counts over a follow-up of 0.5-2 years;
    ``fit_rate`` vs statsmodels' discrete ``NegativeBinomial`` with the same offset.
Each figure is the ratio of the best of seven times, the two calls alternating (ours / statsmodels): the wrapper adds
checks, the standardised means and their delta-method covariance; the target is <= 1.5.
"""
from __future__ import annotations

import time
import warnings

import numpy as np
import pandas as pd

SEED = 20261212
VISITS = ("Week 2", "Week 4", "Week 8", "Week 12", "Week 16", "Week 24")
ARMS = ("Placebo", "Active")
REPEATS = 7


def simulate_binary(n_subjects: int = 600, seed: int = SEED) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    k = len(VISITS)
    arm = np.arange(n_subjects) % 2
    baseline = rng.normal(0.0, 1.0, n_subjects)
    shared = rng.normal(0.0, 1.0, n_subjects)
    eta = (-0.5 + np.linspace(0.0, 0.6, k)[None, :] + 0.15 * np.arange(k)[None, :] * arm[:, None]
           + 0.5 * baseline[:, None] + shared[:, None])
    response = (rng.random((n_subjects, k)) < 1 / (1 + np.exp(-eta))).astype(float)
    return pd.DataFrame({"USUBJID": np.repeat([f"S{i:05d}" for i in range(n_subjects)], k),
                         "TRT01P": np.repeat(np.asarray(ARMS)[arm], k), "AVISIT": np.tile(VISITS, n_subjects),
                         "BASE": np.repeat(baseline, k), "RESPONSE": response.ravel()})


def simulate_counts(n_subjects: int = 6000, seed: int = SEED) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    arm = np.arange(n_subjects) % 2
    years = rng.uniform(0.5, 2.0, n_subjects)
    baseline = rng.normal(0.0, 1.0, n_subjects)
    mean = years * np.exp(0.3 - 0.35 * arm + 0.3 * baseline)
    counts = rng.poisson(mean * rng.gamma(2.0, 0.5, n_subjects))
    return pd.DataFrame({"USUBJID": [f"S{i:05d}" for i in range(n_subjects)], "TRT01P": np.asarray(ARMS)[arm],
                         "BASE": baseline, "EVENTS": counts, "YEARS": years})


def gee_ours(data):
    import trialcut as tc
    return tc.fit_gee(data, outcome="RESPONSE", subject="USUBJID", visit="AVISIT", arm="TRT01P", reference="Placebo",
                      visits=VISITS, covariates=("BASE",), family="binomial", correlation="exchangeable")


def gee_statsmodels(data):
    import statsmodels.api as sm
    active = (data["TRT01P"] == "Active").to_numpy(float)
    visit_columns = [(data["AVISIT"] == v).to_numpy(float) for v in VISITS[1:]]
    design = np.column_stack([np.ones(len(data)), active, *visit_columns, *[active * v for v in visit_columns],
                              data["BASE"].to_numpy(float)])
    model = sm.GEE(data["RESPONSE"].to_numpy(float), design, groups=pd.factorize(data["USUBJID"])[0],
                   family=sm.families.Binomial(), cov_struct=sm.cov_struct.Exchangeable())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return model.fit()


def rate_ours(data):
    import trialcut as tc
    return tc.fit_rate(data, outcome="EVENTS", arm="TRT01P", reference="Placebo", covariates=("BASE",),
                       exposure="YEARS")


def rate_statsmodels(data):
    import statsmodels.api as sm
    design = np.column_stack([np.ones(len(data)), (data["TRT01P"] == "Active").to_numpy(float),
                              data["BASE"].to_numpy(float)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = sm.NegativeBinomial(data["EVENTS"].to_numpy(float), design, loglike_method="nb2",
                                     offset=np.log(data["YEARS"].to_numpy(float))).fit(disp=0, maxiter=200)
        result.cov_params()
    return result


def paired_best(ours, reference, data, repeats: int = REPEATS):
    """Best times of the two calls run alternately, so that both meet the same load on a shared machine."""
    best = [float("inf"), float("inf")]
    results = [None, None]
    for _ in range(repeats):
        for index, function in enumerate((ours, reference)):
            start = time.perf_counter()
            results[index] = function(data)
            best[index] = min(best[index], time.perf_counter() - start)
    return best[0], results[0], best[1], results[1]


def _row(figure, value, unit, target, passed, detail=""):
    return {"figure": figure, "value": value, "unit": unit, "target": target, "passed": bool(passed),
            "detail": detail}


def run() -> list[dict]:
    rows = []
    binary = simulate_binary()
    gee_ours(binary), gee_statsmodels(binary)                    # warm imports and caches
    ours_time, ours, reference_time, reference = paired_best(gee_ours, gee_statsmodels, binary)
    gap = abs(float(ours.coefficients["estimate"].iloc[1]) - float(reference.params[1]))
    ratio = ours_time / reference_time
    rows.append(_row("GEE exchangeable, binary, 600 x 6: time ours / statsmodels GEE", ratio, "x", "<= 1.5",
                     ratio <= 1.5 and gap < 1e-6,
                     f"ours {ours_time:.3f} s, statsmodels {reference_time:.3f} s; arm coefficient gap {gap:.1e}"))
    counts = simulate_counts()
    rate_ours(counts), rate_statsmodels(counts)
    ours_time, ours, reference_time, reference = paired_best(rate_ours, rate_statsmodels, counts)
    gap = abs(float(np.log(ours.differences().iloc[0]["estimate"])) - float(reference.params[1]))
    ratio = ours_time / reference_time
    rows.append(_row("negative binomial, 6,000 participants: time ours / statsmodels NegativeBinomial", ratio, "x",
                     "<= 1.5", ratio <= 1.5 and gap < 1e-6,
                     f"ours {ours_time:.3f} s, statsmodels {reference_time:.3f} s; log rate ratio gap {gap:.1e}"))
    return rows


if __name__ == "__main__":
    for row in run():
        print(row)
