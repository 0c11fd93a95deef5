"""A RENDERING FIXTURE: a results dict shaped exactly like results.json (format 1).

Everything here is invented for testing the report layer and nothing else.  The study
(LVT-201, "Lorvatide") does not exist.  The data are simulated with a fixed seed; the
descriptive tables are computed from the simulated values, while the "model" tables are
simple stand-ins (observed means and pooled standard errors), NOT the output of a
repeated-measures fit.  The report layer only has to show these numbers faithfully, so
plausible values are all it needs.  Real runs under outputs/ replace this once they exist.
"""
from __future__ import annotations

import copy
import math

import numpy as np
from scipy import stats as scipy_stats

ARMS = ("Placebo", "Lorvatide 10 mg", "Lorvatide 20 mg")
REFERENCE = "Placebo"
VISITS = ("Week 2", "Week 4", "Week 8", "Week 12")
VISIT_DAYS = (14, 28, 56, 84)
PRIMARY_VISIT = "Week 12"
# True mean change (mmol/L) per arm and visit used by the simulation.
TRUE_CHANGE = {
    "Placebo": (-0.1, -0.2, -0.2, -0.3),
    "Lorvatide 10 mg": (-0.4, -0.7, -1.0, -1.1),
    "Lorvatide 20 mg": (-0.5, -0.9, -1.3, -1.5),
}
PER_ARM = 60
SEED = 20240517


def table(title: str, columns: list[str], rows: list[list]) -> dict:
    return {"title": title, "columns": list(columns), "data": [list(r) for r in rows]}


def _clean(value):
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return None if math.isnan(value) else value
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def _simulate(seed: int = SEED):
    """Long records: (subject, arm, visit index, baseline, change or NaN)."""
    rng = np.random.default_rng(seed)
    correlation = 0.6 ** np.abs(np.subtract.outer(np.arange(4), np.arange(4)))
    covariance = correlation * 0.8 ** 2
    records = []
    number = 0
    for arm in ARMS:
        for _ in range(PER_ARM):
            number += 1
            subject = f"LVT-201-{100 + number:04d}"
            baseline = round(float(rng.normal(9.2, 1.4)), 1)
            change = np.array(TRUE_CHANGE[arm]) + rng.multivariate_normal(np.zeros(4), covariance)
            # Monotone dropout of about 15% by Week 12, plus a few skipped visits.
            last = 4
            u = rng.uniform()
            if u < 0.06:
                last = 2
            elif u < 0.15:
                last = 3
            for index in range(4):
                value = round(float(change[index]), 1)
                if index >= last or rng.uniform() < 0.03:
                    value = float("nan")
                records.append((subject, arm, index, baseline, value))
    return records


def _descriptive(records):
    rows, missing = [], []
    for arm in ARMS:
        for index, visit in enumerate(VISITS):
            cell = [r for r in records if r[1] == arm and r[2] == index]
            for variable, pick in (("AVAL", lambda r: r[3] + r[4]), ("CHG", lambda r: r[4])):
                values = np.array([pick(r) for r in cell if not math.isnan(r[4])])
                q1, median, q3 = np.quantile(values, [0.25, 0.5, 0.75])
                rows.append([arm, visit, variable, int(values.size), float(values.mean()),
                             float(values.std(ddof=1)), float(median), float(q1), float(q3),
                             float(values.min()), float(values.max())])
            observed = sum(1 for r in cell if not math.isnan(r[4]))
            missing.append([arm, visit, len(cell), observed, len(cell) - observed,
                            100.0 * (len(cell) - observed) / len(cell)])
    return rows, missing


def _patterns(records):
    by_subject: dict[str, list] = {}
    arm_of = {}
    for subject, arm, index, _, value in records:
        by_subject.setdefault(subject, ["."] * 4)[index] = "." if math.isnan(value) else "X"
        arm_of[subject] = arm
    rows = []
    for arm in ARMS:
        counts: dict[str, int] = {}
        members = [s for s in by_subject if arm_of[s] == arm]
        for subject in members:
            pattern = "".join(by_subject[subject])
            counts[pattern] = counts.get(pattern, 0) + 1
        for pattern, count in sorted(counts.items(), key=lambda item: (-item[1], item[0])):
            monotone = "X" not in pattern.lstrip("X")
            rows.append([arm, pattern, count, count / len(members), monotone])
    return rows


def _stand_in_model(records):
    """Observed means with pooled SEs: a stand-in for model output, for rendering only."""
    means, differences, residuals = [], [], []
    cell_mean = {}
    for arm in ARMS:
        for index, visit in enumerate(VISITS):
            values = np.array([r[4] for r in records if r[1] == arm and r[2] == index and not math.isnan(r[4])])
            mean, se = values.mean(), values.std(ddof=1) / math.sqrt(values.size)
            df = 3 * PER_ARM - 12.0 + 0.37 * index
            half = scipy_stats.t.ppf(0.975, df) * se
            means.append([arm, visit, mean, se, df, mean - half, mean + half])
            cell_mean[(arm, index)] = (mean, se, df)
    for arm in ARMS[1:]:
        for index, visit in enumerate(VISITS):
            mean, se, df = cell_mean[(arm, index)]
            ref_mean, ref_se, _ = cell_mean[(REFERENCE, index)]
            estimate, std_error = mean - ref_mean, math.hypot(se, ref_se)
            t = estimate / std_error
            p = 2 * scipy_stats.t.sf(abs(t), df)
            half = scipy_stats.t.ppf(0.975, df) * std_error
            differences.append([arm, REFERENCE, visit, estimate, std_error, df, t, p,
                                estimate - half, estimate + half])
    for subject, arm, index, baseline, value in records:
        if not math.isnan(value):
            fitted = cell_mean[(arm, index)][0]
            residuals.append([subject, arm, VISITS[index], fitted, value - fitted, (value - fitted) / 0.8])
    return means, differences, residuals


def _matrix_tables(records):
    complete: dict[str, list] = {}
    for subject, _, index, _, value in records:
        complete.setdefault(subject, [None] * 4)[index] = value
    rows = np.array([v for v in complete.values() if not any(math.isnan(x) for x in v)])
    covariance = np.cov(rows, rowvar=False)
    sd = np.sqrt(np.diag(covariance))
    correlation = covariance / np.outer(sd, sd)
    columns = ["visit", *VISITS]
    return (
        table("Estimated covariance matrix", columns,
              [[VISITS[i], *map(float, covariance[i])] for i in range(4)]),
        table("Estimated correlation matrix", columns,
              [[VISITS[i], *map(float, correlation[i])] for i in range(4)]),
    )


def _shifted(differences, shift: float, widen: float) -> list[list]:
    rows = []
    for arm, ref, visit, estimate, se, df, _, _, _, _ in differences:
        estimate, se = estimate + shift, se * widen
        t = estimate / se
        p = 2 * scipy_stats.t.sf(abs(t), df)
        half = scipy_stats.t.ppf(0.975, df) * se
        rows.append([arm, ref, visit, estimate, se, df, t, p, estimate - half, estimate + half])
    return rows


def _tipping_grid(differences) -> list[list]:
    rows = []
    at_primary = [d for d in differences if d[2] == PRIMARY_VISIT]
    for arm, ref, visit, estimate, se, df, *_ in at_primary:
        for shift in (0.0, 0.25, 0.5, 0.75, 1.0, 1.25, 1.5):
            for reference_shift in (0.0, -0.25, -0.5):
                moved = estimate + 0.7 * shift - 0.5 * reference_shift
                moved_se = se * 1.08
                p = 2 * scipy_stats.t.sf(abs(moved / moved_se), df)
                half = scipy_stats.t.ppf(0.975, df) * moved_se
                rows.append([arm, visit, shift, reference_shift, moved, moved_se, moved - half,
                             moved + half, p, p < 0.05])
    return rows


def _analysis(identifier, label, role, method, estimand, tables, fit=None, diagnostics=None, options=None):
    return {
        "id": identifier, "label": label, "role": role, "method": method, "estimand": estimand,
        "population": "fas", "status": "ok", "error": None, "options": options or {},
        "tables": tables, "fit": fit or {}, "diagnostics": diagnostics or {},
        "seconds": 0.5,
    }


def build_results(*, unlocked: bool = False, dummy_arms: bool = False, seed: int = SEED) -> dict:
    """The rendering fixture: one run of the invented study LVT-201 at cut 'interim-1'."""
    records = _simulate(seed)
    descriptive, missing = _descriptive(records)
    patterns = _patterns(records)
    means, differences, residuals = _stand_in_model(records)
    covariance, correlation = _matrix_tables(records)
    difference_columns = ["arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper"]
    primary = _analysis(
        "primary_mmrm", "Repeated-measures model, treatment policy", "primary", "mmrm", "main",
        {
            "differences": table("Differences from the reference arm", difference_columns, differences),
            "marginal_means": table("Model-estimated means by arm and visit",
                                    ["arm", "visit", "estimate", "se", "df", "lower", "upper"], means),
            "joint_tests": table("Tests of each effect, all its coefficients at once",
                                 ["term", "num_df", "den_df", "F", "p"], [
                ["arm", 2, 176.3, 24.61, 1.9e-9], ["visit", 3, 171.9, 31.2, 2.2e-16],
                ["arm_by_visit", 6, 177.4, 5.83, 1.6e-5], ["BASE", 1, 175.2, 0.41, 0.523],
                ["BASE_by_visit", 3, 171.0, 1.12, 0.342]]),
            "fixed_effects": table("Estimated coefficients of the model", ["term", "estimate", "se", "df", "t", "p"], [
                ["Intercept (Placebo at Week 2)", -0.112, 0.118, 176.1, -0.949, 0.344],
                ["BASE (per unit) at Week 2", 0.021, 0.033, 175.2, 0.636, 0.526]]),
            "covariance": covariance,
            "correlation": correlation,
        },
        fit={
            "converged": True, "structure": "unstructured", "method": "reml", "df_method": "kenward_roger",
            "loglik": -512.8316, "aic": 1045.6632, "bic": 1077.514, "n_subjects": 180,
            "n_obs": sum(1 for r in records if not math.isnan(r[4])), "n_subjects_excluded": 0,
            "iterations": 9, "gradient_norm": 3.1e-7,
            "attempts": [
                {"structure": "unstructured", "status": "used", "reason": None, "stage": "fit"},
            ],
            "covariate_summary": {"BASE": {"mean": 9.21, "kind": "numeric"}},
            "covariates": ["BASE"], "covariates_by_visit": ["BASE"],
            "multiplicity": {"method": "holm", "alpha": 0.05, "hypotheses": table(
            "Multiplicity-adjusted tests", ["id", "analysis", "arm", "visit", "weight", "p", "adjusted_p", "rejected"],
            [["high_dose", "primary_mmrm", ARMS[2], PRIMARY_VISIT, 0.5, differences[-1][7],
              min(1.0, 2 * differences[-1][7]), True],
             ["low_dose", "primary_mmrm", ARMS[1], PRIMARY_VISIT, 0.5, differences[3][7],
              min(1.0, differences[3][7]), True]])},
        "warnings": [],
        },
        diagnostics={"residuals": table("Residuals and fitted values",
                                        ["USUBJID", "arm", "visit", "fitted", "residual", "scaled_residual"],
                                        residuals)},
        options={"covariance": ["unstructured", "heterogeneous_toeplitz"], "covariates": ["BASE"],
                 "covariates_by_visit": ["BASE"], "method": "reml", "df": "kenward_roger",
                 "robust": False, "confidence_level": 0.95},
    )
    ancova = _analysis(
        "observed_ancova", "Covariance analysis at each visit, observed data", "sensitivity", "ancova",
        "main", {"differences": table("Differences from the reference arm (observed data)",
                                      difference_columns, _shifted(differences, 0.02, 1.04))})
    jump = _analysis(
        "mi_jump_to_reference", "Multiple imputation, jump to reference", "sensitivity",
        "multiple_imputation", "main",
        {"differences": table("Pooled differences (Rubin's rules)", difference_columns,
                              _shifted(differences, 0.18, 1.12))},
        fit={"assumption": "jump_to_reference", "imputations": 100, "seed": 912834},
        options={"assumption": "jump_to_reference", "imputations": 100})
    tipping = _analysis(
        "tipping_point", "Tipping-point analysis", "sensitivity", "tipping_point", "main",
        {"tipping_grid": table("Tipping-point grid at the primary visit",
                               ["arm", "visit", "active_shift", "reference_shift", "estimate", "se", "lower",
                                "upper", "p", "significant"], _tipping_grid(differences)),
         "tipping_points": table("Shift at which the conclusion changes",
                                 ["arm", "reference_shift", "tipping_shift", "statement"],
                                 [[arm, 0.0, None, "the conclusion does not change for shifts from 0 to 1.5"]
                                  for arm in ARMS[1:]])},
        options={"shifts": [0.0, 0.25, 0.5, 0.75, 1.0, 1.25, 1.5], "reference_shifts": [0.0, -0.25, -0.5],
                 "alpha": 0.05})
    trajectories = table(
        "Observed change from baseline per participant", ["USUBJID", "arm", "visit", "value"],
        [[s, a, VISITS[i], v] for s, a, i, _, v in records if not math.isnan(v)])
    n_per_arm = [PER_ARM] * 3
    results = {
        "format": 1,
        "run": {
            "id": "20261201T221500Z-3f9c2a", "study_id": "LVT-201", "cut": "interim-1",
            "started_utc": "2026-12-01T22:15:00Z", "finished_utc": "2026-12-01T22:15:41Z",
            "tool_version": "0.1.0", "unlocked": unlocked,
            "dummy_arms_seed": 777 if dummy_arms else None, "seed": 20240101,
        },
        "plan": {
            "file": "analysis_plans/lvt201.yaml",
            "sha256": "5b1e0c4f9a7d2e8b6c3a1f0e9d8c7b6a5f4e3d2c1b0a9f8e7d6c5b4a3f2e1d0c",
            "version": "1.1",
            "lock_status": "unlocked" if unlocked else "locked",
            "lock": None if unlocked else {
                "sha256": "5b1e0c4f9a7d2e8b6c3a1f0e9d8c7b6a5f4e3d2c1b0a9f8e7d6c5b4a3f2e1d0c",
                "locked_by": "A. Statistician", "locked_utc": "2026-10-02T09:30:00Z",
                "reason": "Plan frozen before first unblinded look",
                "amendments": [
                    {"version": "1.0", "sha256": "0d9e8f7a6b5c4d3e2f1a0b9c8d7e6f5a4b3c2d1e0f9a8b7c6d5e4f3a2b1c0d9e",
                     "locked_utc": "2026-08-14T12:00:00Z", "by": "A. Statistician", "reason": "Original plan"},
                    {"version": "1.1", "sha256": "5b1e0c4f9a7d2e8b6c3a1f0e9d8c7b6a5f4e3d2c1b0a9f8e7d6c5b4a3f2e1d0c",
                     "locked_utc": "2026-10-02T09:30:00Z", "by": "A. Statistician",
                     "reason": "Added tipping-point analysis"},
                ],
            },
            "study": {"id": "LVT-201", "title": "Lorvatide in adults with type 2 diabetes (invented study)",
                      "phase": "2", "sponsor": "Invented Sponsor", "indication": "Type 2 diabetes"},
            "arms": {"reference": REFERENCE, "list": [{"code": a, "label": a} for a in ARMS], "strata": []},
            "visits": {"baseline": "Baseline", "windowing": False,
                       "schedule": [{"label": v, "order": i + 1, "day": d, "window": None}
                                    for i, (v, d) in enumerate(zip(VISITS, VISIT_DAYS))]},
            "populations": [
                {"id": "fas", "label": "Full analysis set", "flag": "FASFL"},
                {"id": "safety", "label": "Safety set", "flag": "SAFFL"},
            ],
            "intercurrent_events": [
                {"id": "rescue", "label": "Rescue medication started", "day_column": "RESCDY"},
                {"id": "stop", "label": "Study treatment stopped early", "day_column": "TRTSTPDY"},
            ],
            "estimands": [{
                "id": "main", "label": "Treatment-policy effect on fasting blood sugar",
                "population": "fas",
                "treatment": "Lorvatide once daily versus placebo, each added to standard care",
                "intercurrent_events": [
                    {"event": "rescue", "strategy": "hypothetical", "composite_value": None},
                    {"event": "stop", "strategy": "treatment_policy", "composite_value": None},
                ],
                "summary": "Difference in mean change from baseline at Week 12 between each dose and placebo",
            }],
            "multiplicity": {"method": "holm", "alpha": 0.05, "hypotheses": [], "transitions": []},
            "report": {
                "title": "LVT-201 efficacy analyses", "paper": "A4", "table_prefix": "Table 14.2.",
                "figure_prefix": "Figure 14.2.",
                "decimals": {"mean_extra": 1, "sd_extra": 2, "p_value": 3}, "trajectories_sample": 30,
            },
        },
        "data": {
            "file": "data/lvt201_interim1.csv", "format": "csv", "size": 412_880,
            "sha256": "c0ffee00a1b2c3d4e5f60718293a4b5c6d7e8f90a1b2c3d4e5f60718293a4b5c",
            "rows": len(records) + 3 * PER_ARM, "participants": 3 * PER_ARM,
            "columns": ["USUBJID", "TRT01P", "AVISIT", "AVISITN", "ADY", "AVAL", "BASE", "CHG",
                        "ABLFL", "PARAMCD", "FASFL", "SAFFL", "RESCDY", "TRTSTPDY"],
        },
        "conformance": {
            "checks": [
                {"id": "required_columns", "description": "Every mapped column is present", "severity": "error",
                 "status": "passed", "count": 0, "rows": []},
                {"id": "one_record_per_visit", "description": "At most one record per participant and visit",
                 "severity": "error", "status": "passed", "count": 0, "rows": []},
                {"id": "value_in_range", "description": "Measured values lie in the plan's range",
                 "severity": "warning", "status": "failed", "count": 2,
                 "rows": [{"row": 388, "where": "line 388", "subject": "LVT-201-0117", "visit": "Week 8"},
                          {"row": 512, "where": "line 512", "subject": "LVT-201-0142", "visit": "Week 4"}]},
                {"id": "unscheduled_visits", "description": "Records at visits not in the schedule",
                 "severity": "info", "status": "passed", "count": 0, "rows": []},
            ],
            "derivations": ["CHG recomputed as AVAL - BASE and compared with the supplied column",
                            *[{"step": "visit_window", "participant": f"LVT-201-{101 + i:04d}",
                               "reason": f"day {40 + i} is outside every visit window"} for i in range(7)]],
        },
        "populations": table("Participants in each analysis population", ["population", *ARMS, "Total"],
                             [["Full analysis set", *n_per_arm, sum(n_per_arm)],
                              ["Safety set", 60, 59, 60, 179]]),
        "disposition": table("Disposition", ["status", *ARMS, "total"], [
            ["Randomised", *n_per_arm, 180], ["Completed Week 12", 52, 50, 51, 153],
            ["Stopped study treatment early", 6, 8, 7, 21], ["Started rescue medication", 5, 3, 2, 10]]),
        "endpoints": [{
            "id": "fbs_change", "label": "Change from baseline in fasting blood sugar (mmol/L)",
            "analysed": "change", "primary_visit": PRIMARY_VISIT, "decimals": 1,
            "descriptive": table("Fasting blood sugar by arm and visit",
                                 ["arm", "visit", "variable", "n", "mean", "sd", "median", "q1", "q3",
                                  "min", "max"], descriptive),
            "missing_by_visit": table("Missing values by visit",
                                      ["arm", "visit", "expected", "observed", "missing", "percent_missing"],
                                      missing),
            "missing_patterns": table("Patterns of observed visits",
                                      ["arm", "pattern", "count", "share", "monotone"], patterns),
            "trajectories": trajectories,
            "analyses": [primary, ancova, jump, tipping],
        }],
        "multiplicity": {"method": "holm", "alpha": 0.05, "hypotheses": table(
            "Multiplicity-adjusted tests", ["id", "analysis", "arm", "visit", "weight", "p", "adjusted_p", "rejected"],
            [["high_dose", "primary_mmrm", ARMS[2], PRIMARY_VISIT, 0.5, differences[-1][7],
              min(1.0, 2 * differences[-1][7]), True],
             ["low_dose", "primary_mmrm", ARMS[1], PRIMARY_VISIT, 0.5, differences[3][7],
              min(1.0, differences[3][7]), True]])},
        "warnings": ["value_in_range: 2 values outside the plan's range were kept (severity warning)"],
    }
    return _deep_clean(results)


def _deep_clean(value):
    if isinstance(value, dict):
        return {k: _deep_clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_deep_clean(v) for v in value]
    return _clean(value)


def with_unknown_and_failed(results: dict) -> dict:
    """The fixture plus an analysis of a method the report does not know and a failed one."""
    results = copy.deepcopy(results)
    analyses = results["endpoints"][0]["analyses"]
    analyses.append({
        "id": "responders", "label": "Share reaching target", "role": "sensitivity",
        "method": "responder_share", "estimand": "main", "population": "fas", "status": "ok",
        "error": None, "options": {}, "fit": {"threshold": -1.0}, "diagnostics": {},
        "tables": {"shares": table("Share of participants reaching the target",
                                   ["arm", "visit", "share"],
                                   [["Placebo", "Week 12", 0.21], ["Lorvatide 20 mg", "Week 12", 0.47]])},
    })
    analyses.append({
        "id": "mi_copy_reference", "label": "Multiple imputation, copy reference", "role": "sensitivity",
        "method": "multiple_imputation", "estimand": "main", "population": "fas", "status": "failed",
        "error": "FitError: every covariance structure tried failed (unstructured: not positive definite)",
        "options": {}, "tables": {}, "fit": {}, "diagnostics": {},
    })
    return results


def with_hostile_text(results: dict) -> dict:
    """The fixture with markup in the study title and the labels: must render as inert text."""
    results = copy.deepcopy(results)
    payload = "<script>alert(1)</script>"
    results["plan"]["study"]["title"] = f"{payload} study"
    results["endpoints"][0]["label"] = f"Endpoint {payload}"
    results["endpoints"][0]["analyses"][0]["label"] = f"Primary {payload}"
    results["run"]["cut"] = f"cut-{payload}"
    return results
