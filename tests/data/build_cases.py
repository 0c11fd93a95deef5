"""Rebuild tests/cases/_base/data.csv and the data bad-input case folders tests/cases/data_*.

Run from the repository root: ``.venv/bin/python tests/data/build_cases.py``.  The base cut
is the invented LVT-201 trial from :mod:`trialcut.data.simulate` (30 participants); each
case copies it (or its first participants) and breaks one thing.  The cases are kept as
files; this script only says how they were made.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import pandas as pd
import yaml

from trialcut.data.readers import write_dataset_json
from trialcut.data.simulate import simulate_trial, write_csv

CASES = Path(__file__).resolve().parents[1] / "cases"
BASE = CASES / "_base"
BASE_SEED, BASE_PARTICIPANTS, BASE_ENROLMENT_DAYS = 2028, 30, 60
RUN = ["run", "{base}/plan.yaml", "--data", "{case}/data.csv", "--cut", "c1", "--out", "{out}", "--unlocked"]


def base_frame() -> pd.DataFrame:
    return simulate_trial(seed=BASE_SEED, n_participants=BASE_PARTICIPANTS, enrolment_days=BASE_ENROLMENT_DAYS)


def _small(frame: pd.DataFrame, participants: int = 6) -> pd.DataFrame:
    keep = frame["USUBJID"].drop_duplicates().head(participants)
    return frame[frame["USUBJID"].isin(keep)].reset_index(drop=True).astype(object)


def _case(name: str, description: str, message: str, argv=None, frame=None, files=None) -> None:
    folder = CASES / name
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    if frame is not None:
        write_csv(_tidy(frame), folder / "data.csv")
    for file_name, writer in (files or {}).items():
        writer(folder / file_name)
    spec = {"description": description, "argv": argv or RUN, "exit": 2, "message": message}
    (folder / "case.yaml").write_text(yaml.safe_dump(spec, sort_keys=False, allow_unicode=True), encoding="utf-8")


def _tidy(frame: pd.DataFrame) -> pd.DataFrame:
    """Whole numbers in text-typed columns printed as in the base cut (18, not 18.0)."""
    def tidy(value):
        if isinstance(value, float) and value == value and value.is_integer():
            return str(int(value))
        return value
    return frame.map(tidy)


def _plan_without_windowing(path: Path) -> None:
    text = (BASE / "plan.yaml").read_text(encoding="utf-8")
    assert "windowing: true" in text
    path.write_text(text.replace("windowing: true", "windowing: false"), encoding="utf-8")


def _line_of(frame: pd.DataFrame, position: int) -> int:
    return position + 2          # CSV: the header is line 1


def build() -> None:
    full = base_frame()
    write_csv(full, BASE / "data.csv")
    small = _small(full)
    post = small.index[small["AVISIT"] == "Week 2"][1]

    frame = small.drop(columns=["FASFL"])
    _case("data_missing_column", "The population flag column FASFL named by the plan is absent.",
          "columns the plan needs that are missing: FASFL", frame=frame)

    frame = small.copy()
    frame.loc[post, "AVAL"] = "twelve"
    _case("data_non_numeric_outcome", "AVAL holds a word; the message names its CSV line.",
          f"line {_line_of(frame, post)} ({frame.loc[post, 'USUBJID']}, Week 2): 'twelve'", frame=frame)

    frame = small.copy()
    frame.loc[frame["USUBJID"] == frame["USUBJID"].iloc[0], "TRT01P"] = "Lorvatide 30 mg"
    _case("data_unknown_arm", "An arm that the plan does not declare.",
          "arms not in the plan: 'Lorvatide 30 mg'", frame=frame)

    frame = small[small["AVISIT"] != "Unscheduled"].reset_index(drop=True).copy()
    frame.loc[frame.index[frame["AVISIT"] == "Week 8"][0], "AVISIT"] = "Week 6"
    _case("data_unknown_visit", "Without windowing, a visit label the plan does not schedule.",
          "visit labels not in the plan: 'Week 6'", frame=frame,
          argv=[a.replace("{base}/plan.yaml", "{case}/plan.yaml") for a in RUN],
          files={"plan.yaml": _plan_without_windowing})

    frame = small[small["AVISIT"] != "Unscheduled"].reset_index(drop=True)
    extra = frame[frame["AVISIT"] == "Week 4"].head(1).assign(ADY=lambda f: f["ADY"].astype(float) + 2,
                                                            AVAL=lambda f: f["AVAL"].astype(float) + 1)
    frame = pd.concat([frame, extra], ignore_index=True)
    _case("data_duplicate_visit_no_windowing", "Without windowing, two records of one participant at Week 4.",
          "more than one record at the same visit", frame=frame,
          argv=[a.replace("{base}/plan.yaml", "{case}/plan.yaml") for a in RUN],
          files={"plan.yaml": _plan_without_windowing})

    extra = small.loc[[post]].assign(AVISIT="Unscheduled", AVISITN=None, AVAL=float(small.loc[post, "AVAL"]) + 2)
    _case("data_same_day_records", "With windowing, two different records of one participant on one study day.",
          "two different records on the same study day", frame=pd.concat([small, extra], ignore_index=True))

    _case("data_exact_duplicate", "One record repeated exactly.", "records repeated exactly",
          frame=pd.concat([small, small.loc[[post]]], ignore_index=True))

    frame = small.copy()
    frame.loc[post, "TRT01P"] = "Placebo" if frame.loc[post, "TRT01P"] != "Placebo" else "Lorvatide 10 mg"
    _case("data_arm_changes", "The arm of one participant changes between records.",
          "the arm changes within a participant", frame=frame)

    frame = small.copy()
    frame.loc[post, "AVAL"] = 75
    frame.loc[post, "CHG"] = None
    _case("data_value_out_of_range", "A score of 75 on a 0 to 60 scale.",
          "values outside the endpoint's declared range", frame=frame)

    frame = small.copy()
    frame.loc[post, "AVAL"] = "inf"
    _case("data_infinite_value", "An infinite score.", "numeric values that are infinite", frame=frame)

    frame = small.copy()
    frame.loc[frame["USUBJID"] == frame["USUBJID"].iloc[0], "FASFL"] = "Yes"
    _case("data_bad_population_flag", "A population flag written Yes instead of Y.",
          "population flags other than Y, N or blank", frame=frame)

    frame = small.copy()
    first = frame.index[frame["AVISIT"] == "Baseline"][0]
    frame = pd.concat([frame, frame.loc[[first]].assign(ADY=-6, AVAL=float(frame.loc[first, "AVAL"]) + 1)],
                      ignore_index=True)
    _case("data_two_baselines", "Two records of one participant flagged as baseline.",
          "more than one baseline record", frame=frame)

    _case("data_empty_file", "The data file is empty.", "the data file is empty",
          files={"data.csv": lambda p: p.write_text("", encoding="utf-8")})

    _case("data_ragged_csv", "A CSV line has more fields than the header.", "the csv file cannot be parsed",
          files={"data.csv": lambda p: p.write_text("USUBJID,AVAL\nS1,1\nS2,1,3\n", encoding="utf-8")})

    _case("data_wrong_extension", "A spreadsheet file is not one of the known formats.",
          "cannot tell the format of the data file",
          argv=[a.replace("{case}/data.csv", "{case}/data.xlsx") for a in RUN],
          files={"data.xlsx": lambda p: p.write_bytes(b"PK\x03\x04 not a data cut")})

    _case("data_missing_file", "The data file named on the command line does not exist.",
          "the data file does not exist", argv=[a.replace("{case}/data.csv", "{case}/absent.csv") for a in RUN])

    def malformed_json(path: Path) -> None:
        write_dataset_json(small.head(3).infer_objects(), path, created="2026-01-01T00:00:00Z")
        document = json.loads(path.read_text(encoding="utf-8"))
        del document["columns"]
        path.write_text(json.dumps(document), encoding="utf-8")

    _case("data_malformed_dataset_json", "A Dataset-JSON file without its 'columns'.",
          "required top-level attributes are missing",
          argv=[a.replace("{case}/data.csv", "{case}/data.json") for a in RUN], files={"data.json": malformed_json})

    def parquet_with_text_scores(path: Path) -> None:
        frame = small.infer_objects()
        frame = frame.assign(AVAL=frame["AVAL"].map(lambda v: f"{v:g} points"))
        frame.to_parquet(path, index=False)

    _case("data_parquet_wrong_type", "A Parquet file that stores the score AVAL as text.",
          "column AVAL holds values that are not numbers",
          argv=[a.replace("{case}/data.csv", "{case}/data.parquet") for a in RUN],
          files={"data.parquet": parquet_with_text_scores})


if __name__ == "__main__":
    build()
