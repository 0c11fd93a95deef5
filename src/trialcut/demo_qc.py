"""The demo's second programmer: the analysis of covariance at Week 12 (``ancova_observed`` in
analysis_plans/demo.yaml), programmed again from the raw demo data cut with pandas, numpy and
scipy only, written as a QC file for ``trialcut qc``.

Independence is the point of double programming, so nothing here imports trialcut: the rules
are re-implemented from the plan's words.
- Full analysis set: FASFL is "Y".  Parameter FBS.
- Week 12 is study day 85 ± 10; of several records in the window the one closest to day 85
  is used, a tie going to the later record.
- Primary estimand: after treatment discontinuation (DISCDY on or before the record's study
  day) the value is set aside (hypothetical strategy); rescue medication changes nothing.
- The change from baseline is CHG, or AVAL − BASE where CHG is empty.
- Ordinary least squares of the change on the arm (Placebo the reference), BASE and STRAT1R;
  each dose minus placebo with its standard error, residual degrees of freedom, t, two-sided
  p and 95% confidence interval (textbook linear-model formulas).

Run it as ``python -m trialcut.demo_qc DATA_CSV QC_CSV``.
"""
from __future__ import annotations

import csv
import sys
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

REFERENCE = "Placebo"
VISIT, PLANNED_DAY, HALF_WIDTH = "Week 12", 85, 10
ANALYSIS_ID, TABLE = "ancova_observed", "differences"


def week12_analysis_set(data: pd.DataFrame) -> pd.DataFrame:
    records = data[(data["PARAMCD"] == "FBS") & (data["FASFL"] == "Y") & (data["ABLFL"] != "Y")].copy()
    in_window = records[(records["ADY"] - PLANNED_DAY).abs() <= HALF_WIDTH].copy()
    in_window["distance"] = (in_window["ADY"] - PLANNED_DAY).abs()
    # Closest to the planned day first; among equals the later day.
    in_window = in_window.sort_values(["USUBJID", "distance", "ADY"], ascending=[True, True, False])
    chosen = in_window.drop_duplicates("USUBJID", keep="first").copy()
    chosen["change"] = chosen["CHG"].where(chosen["CHG"].notna(), chosen["AVAL"] - chosen["BASE"])
    stopped = chosen["DISCDY"].notna() & (chosen["DISCDY"] <= chosen["ADY"])
    chosen.loc[stopped, "change"] = np.nan
    return chosen[chosen["change"].notna() & chosen["BASE"].notna()]


def arm_differences(analysed: pd.DataFrame, reference: str = REFERENCE) -> list[dict[str, float | str]]:
    arms = sorted(a for a in analysed["TRT01P"].unique() if a != reference)
    strata = sorted(analysed["STRAT1R"].unique())[1:]
    columns = [np.ones(len(analysed))]
    columns += [(analysed["TRT01P"] == arm).to_numpy(float) for arm in arms]
    columns += [analysed["BASE"].to_numpy(float)]
    columns += [(analysed["STRAT1R"] == level).to_numpy(float) for level in strata]
    design = np.column_stack(columns)
    outcome = analysed["change"].to_numpy(float)
    coefficients, _, rank, _ = np.linalg.lstsq(design, outcome, rcond=None)
    residual_df = len(outcome) - rank
    residuals = outcome - design @ coefficients
    variance = residuals @ residuals / residual_df
    covariance = variance * np.linalg.inv(design.T @ design)
    critical = stats.t.ppf(0.975, residual_df)
    found = []
    for position, arm in enumerate(arms, start=1):
        estimate, std_error = coefficients[position], np.sqrt(covariance[position, position])
        t_value = estimate / std_error
        found.append({"arm": arm, "estimate": estimate, "se": std_error, "df": float(residual_df),
                      "t": t_value, "p": 2 * stats.t.sf(abs(t_value), residual_df),
                      "lower": estimate - critical * std_error, "upper": estimate + critical * std_error})
    return found


def write_qc_file(data_csv: Path, qc_csv: Path) -> Path:
    data = pd.read_csv(data_csv)
    rows = arm_differences(week12_analysis_set(data))
    with open(qc_csv, "w", newline="", encoding="utf-8") as stream:
        writer = csv.writer(stream, lineterminator="\n")
        writer.writerow(["analysis_id", "table", "arm", "visit", "statistic", "value"])
        for row in rows:
            for statistic in ("estimate", "se", "df", "t", "p", "lower", "upper"):
                writer.writerow([ANALYSIS_ID, TABLE, row["arm"], VISIT, statistic, repr(float(row[statistic]))])
    return Path(qc_csv)


if __name__ == "__main__":
    write_qc_file(Path(sys.argv[1]), Path(sys.argv[2]))
