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


def _case(name: str, description: str, message: str, argv=None, frame=None, files=None, exit: int = 2,
          **expected) -> None:
    """``expected``: recorded=True (a run folder and row must exist), failed={analysis: fragment},
    ok=[analysis, ...] — checked by tests/test_bad_input_cases.py."""
    folder = CASES / name
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    if frame is not None:
        write_csv(_tidy(frame), folder / "data.csv")
    for file_name, writer in (files or {}).items():
        writer(folder / file_name)
    spec = {"description": description, "argv": argv or RUN, "exit": exit, "message": message, **expected}
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


# --------------------------------------------------------------------------- issue 10
CASE_RUN = [a.replace("{base}/plan.yaml", "{case}/plan.yaml") for a in RUN]


def _base_text_frame() -> pd.DataFrame:
    """The committed base cut as text, exactly as a CSV reader sees it."""
    return pd.read_csv(BASE / "data.csv", dtype=str, keep_default_na=False)


def _plan_edit(*replacements: tuple[str, str]):
    def write(path: Path) -> None:
        text = (BASE / "plan.yaml").read_text(encoding="utf-8")
        for old, new in replacements:
            assert old in text, old
            text = text.replace(old, new)
        path.write_text(text, encoding="utf-8")
    return write


_NO_RANGE = ("    range: [0, 60]\n", "")
_WITH_IMPUTATION = ("""            covariates: [BASE]
seed: 7""", """            covariates: [BASE]
        - id: mi_jump_to_reference
          label: Multiple imputation, jump to reference
          method: multiple_imputation
          estimand: primary
          options:
            assumption: jump_to_reference
            imputations: 4
            chains: 2
            burn_in: 20
            covariates: [BASE]
seed: 7""")


def _dataset_json(frame: pd.DataFrame, change):
    def write(path: Path) -> None:
        typed = frame.copy()
        for name in ("AVAL", "BASE", "CHG", "ADY", "AVISITN", "AGE", "DISCDY", "RESCDY"):
            if name in typed.columns:
                typed[name] = pd.to_numeric(typed[name].replace("", None))
        write_dataset_json(typed, path, created="2026-01-01T00:00:00Z")
        document = json.loads(path.read_text(encoding="utf-8"))
        change(document)
        path.write_text(json.dumps(document), encoding="utf-8")
    return write


def _set_decimal(document, text: str) -> None:
    position = next(i for i, c in enumerate(document["columns"]) if c["name"] == "AVAL")
    document["columns"][position]["dataType"] = "decimal"
    for row in document["rows"]:
        row[position] = None if row[position] is None else repr(float(row[position]))
    document["rows"][1][position] = text


def build_issue10() -> None:
    """Degenerate and malformed inputs that once ended in exit 3 (issue 10), and the command-line
    values that were accepted too late or not at all."""
    full = _base_text_frame()
    subjects = full["USUBJID"].drop_duplicates()
    by_arm = full.drop_duplicates("USUBJID").groupby("TRT01P")["USUBJID"]
    post = full["ABLFL"] != "Y"
    json_run = [a.replace("{case}/data.csv", "{case}/data.json") for a in RUN]

    _case("data_one_participant", "A cut with a single participant: every analysis fails and says why; the "
          "run is recorded and exits 4 because the primary analysis failed.",
          "primary analysis failed: mmrm_primary", frame=full[full["USUBJID"] == subjects.iloc[0]], exit=4,
          recorded=True, argv=CASE_RUN, files={"plan.yaml": _plan_edit(_WITH_IMPUTATION)},
          failed={"mmrm_primary": "only the reference arm", "ancova_observed": "one arm only",
                  "mi_jump_to_reference": "one arm only"})

    _case("data_reference_arm_only", "Every participant is on placebo, the reference arm: nothing to compare "
          "(the imputation once ended in an internal fault here).", "primary analysis failed: mmrm_primary",
          frame=full[full["TRT01P"] == "Placebo"], exit=4, recorded=True, argv=CASE_RUN,
          files={"plan.yaml": _plan_edit(_WITH_IMPUTATION)},
          failed={"mmrm_primary": "only the reference arm", "ancova_observed": "one arm only",
                  "mi_jump_to_reference": "one arm only"})

    frame = full[full["TRT01P"] == "Lorvatide 10 mg"]
    _case("data_one_arm_only", "Every participant is on one active arm: no reference arm to compare with.",
          "primary analysis failed: mmrm_primary", frame=frame, exit=4, recorded=True,
          failed={"mmrm_primary": "", "ancova_observed": ""})

    for count in (2, 3):
        frame = full[full["USUBJID"].isin(by_arm.head(count))]
        _case(f"data_{count}_per_arm", f"{count} participants per arm, with multiple imputation: every "
              "analysis either runs or fails with its reason; never an internal fault.", "", frame=frame,
              exit=0, recorded=True, argv=CASE_RUN, files={"plan.yaml": _plan_edit(_WITH_IMPUTATION)})

    frame = full.copy()
    frame.loc[post, "AVAL"] = "30"
    frame.loc[post, "CHG"] = (30 - frame.loc[post, "BASE"].astype(float)).map(lambda v: f"{v:g}")
    _case("data_constant_outcome", "Every post-baseline score is 30: the repeated-measures fit cannot converge "
          "and the imputation model is singular; both are recorded failures, the run exits 4.",
          "primary analysis failed: mmrm_primary", frame=frame, exit=4, recorded=True, argv=CASE_RUN,
          files={"plan.yaml": _plan_edit(_WITH_IMPUTATION)},
          failed={"mmrm_primary": "", "mi_jump_to_reference": ""})

    frame = full.copy()
    frame["BASE"] = "30"
    frame.loc[~post, "AVAL"] = "30"
    frame.loc[post, "CHG"] = (frame.loc[post, "AVAL"].astype(float) - 30).map(lambda v: f"{v:g}")
    _case("data_constant_baseline", "Every baseline is 30, a covariate that cannot be separated from the "
          "intercept: each analysis fails naming the rank deficiency.",
          "primary analysis failed: mmrm_primary", frame=frame, exit=4, recorded=True, argv=CASE_RUN,
          files={"plan.yaml": _plan_edit(_WITH_IMPUTATION)},
          failed={"mmrm_primary": "rank deficient", "ancova_observed": "rank deficient",
                  "mi_jump_to_reference": "rank deficient"})

    frame = full.copy()
    first_post = frame.index[post][3]
    frame.loc[first_post, "AVAL"] = "1e200"
    frame.loc[first_post, "CHG"] = ""
    _case("data_huge_outlier_without_range", "One score of 1e200 and no declared range: refused by a "
          "conformance check that names the line, not an overflow inside the fit.",
          f"line {first_post + 2} ({frame.loc[first_post, 'USUBJID']}, {frame.loc[first_post, 'AVISIT']}): '1e+200'",
          frame=frame, argv=CASE_RUN, files={"plan.yaml": _plan_edit(_NO_RANGE)})

    def scaled(factor: float) -> pd.DataFrame:
        frame = full.copy()
        for name in ("AVAL", "BASE", "CHG"):
            frame[name] = frame[name].map(lambda v: repr(float(v) * factor) if v else v)
        return frame

    _case("data_values_near_1e26", "Scores in units of 1e26 (no declared range): every number of the report "
          "is rounded and printed; rounding once failed from 1e26 on.", "", frame=scaled(1e26), exit=0,
          recorded=True, argv=CASE_RUN, files={"plan.yaml": _plan_edit(_NO_RANGE)},
          ok=["mmrm_primary", "ancova_observed"])

    _case("data_values_in_units_of_1e-12", "Scores in units of 1e-12: the rank checks are relative to each "
          "column's size, so every analysis runs (two once called the design rank deficient).", "",
          frame=scaled(1e-12), exit=0, recorded=True, argv=CASE_RUN,
          files={"plan.yaml": _plan_edit(_NO_RANGE, _WITH_IMPUTATION)},
          ok=["mmrm_primary", "ancova_observed", "mi_jump_to_reference"])

    def spaced_header(path: Path) -> None:
        lines = (BASE / "data.csv").read_text(encoding="utf-8").splitlines()
        lines = [lines[0] + ", AVAL"] + [line + "," + line.split(",")[14] for line in lines[1:]]
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")

    _case("data_header_name_repeated_with_a_space", "The header has AVAL and ' AVAL'.",
          "repeated column names; got ' AVAL', 'AVAL'", files={"data.csv": spaced_header})

    frame = full.copy()
    frame["ADY"] = frame["ADY"].map(lambda v: str(int(v) - 400) if v else v)
    _case("data_all_study_days_negative", "Every study day is before randomisation: no record reaches a visit.",
          "no record of any participant falls at an analysis visit", frame=frame)

    _case("data_change_shifted", "CHG is filled but 20 below AVAL − BASE on every post-baseline record.",
          "CHG differs from AVAL − BASE", frame=full.assign(CHG=[
              f"{float(c) - 20:g}" if c else c for c in full["CHG"]]))

    _case("data_semicolon_csv", "A spreadsheet's CSV with semicolons between fields.",
          "separates its fields with semicolons",
          files={"data.csv": lambda p: p.write_text((BASE / "data.csv").read_text(encoding="utf-8")
                                                    .replace(",", ";"), encoding="utf-8")})

    _case("data_latin1_csv", "A CSV saved in Latin-1, with an accented letter on line 3.",
          "not UTF-8 text; expected UTF-8; got byte 0xe9 at line 3, column",
          files={"data.csv": lambda p: p.write_bytes((BASE / "data.csv").read_text(encoding="utf-8")
                                                     .replace("Fatigue", "Fatigu\u00e9", 2).replace(
                                                         "Fatigu\u00e9", "Fatigue", 1).encode("latin-1"))})

    _case("data_missing_column_in_a_wide_file", "One needed column is missing from a file with 19 columns; "
          "the message says both.", f"1 of 9 needed columns missing from a file with {len(full.columns) - 1} columns",
          frame=full.drop(columns=["FASFL"]))

    small = full[full["USUBJID"].isin(subjects.head(6))]
    _case("data_dataset_json_list_as_column_name", "A Dataset-JSON column whose name is a list.",
          "a column name must be non-empty text", argv=json_run,
          files={"data.json": _dataset_json(small, lambda d: d["columns"][0].update(name=["USUBJID"]))})
    _case("data_dataset_json_decimal_nan", "A Dataset-JSON decimal written as the string 'NaN'.",
          "do not fit column AVAL's dataType decimal", argv=json_run,
          files={"data.json": _dataset_json(small, lambda d: _set_decimal(d, "NaN"))})
    _case("data_dataset_json_decimal_1e999", "A Dataset-JSON decimal '1e999', beyond a double.",
          "do not fit column AVAL's dataType decimal", argv=json_run,
          files={"data.json": _dataset_json(small, lambda d: _set_decimal(d, "1e999"))})
    _case("data_dataset_json_deep_nesting", "A JSON file of 100,000 nested arrays.", "nested too deeply",
          argv=json_run, files={"data.json": lambda p: p.write_text("[" * 100_000 + "]" * 100_000)})

    def parquet_decimals(path: Path) -> None:
        import decimal

        import pyarrow as pa
        import pyarrow.parquet as pq

        frame = full.map(lambda v: v or None)
        table = pa.Table.from_pandas(frame, preserve_index=False)
        for name in ("AVAL", "BASE", "CHG", "ADY", "AVISITN", "AGE", "DISCDY", "RESCDY"):
            values = [decimal.Decimal(v) if isinstance(v, str) else None for v in frame[name]]
            table = table.set_column(table.schema.get_field_index(name), name,
                                     pa.array(values, type=pa.decimal128(12, 2)))
        pq.write_table(table, path)

    _case("data_parquet_decimal_columns", "A Parquet file whose numbers are decimal(12, 2) columns, as "
          "databases export them: read as numbers.", "", exit=0, recorded=True,
          argv=[a.replace("{case}/data.csv", "{case}/data.parquet") for a in RUN],
          files={"data.parquet": parquet_decimals}, ok=["mmrm_primary", "ancova_observed"])

    def parquet_with_dates_as_scores(path: Path) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq

        frame = full.map(lambda v: v or None)
        table = pa.Table.from_pandas(frame, preserve_index=False).replace_schema_metadata(None)
        dates = pa.array([pd.Timestamp("2026-01-01")] * len(frame))
        pq.write_table(table.set_column(table.schema.get_field_index("AVAL"), "AVAL", dates), path)

    _case("data_parquet_dates_as_scores", "A Parquet file whose score column holds dates (a column mix-up).",
          "column AVAL holds values that are not numbers",
          argv=[a.replace("{case}/data.csv", "{case}/data.parquet") for a in RUN],
          files={"data.parquet": parquet_with_dates_as_scores})

    _case("data_one_record_per_participant", "Every record has its own participant id (an export that lost "
          "the id): every column is constant within a participant; the analyses fail and say why.",
          "primary analysis failed: mmrm_primary", frame=full.assign(USUBJID=[f"S{i:04d}" for i in range(len(full))]),
          exit=4, recorded=True, failed={"mmrm_primary": "too few participants or visits"})

    without_days = _plan_edit(("windowing: true", "windowing: false"),
                              *[(f", day: {d}, window: {w}}}", "}") for d, w in ((15, 4), (29, 6), (57, 10), (85, 10))])
    _case("run_visits_without_planned_days", "Visits with no planned day and windowing off: the "
          "repeated-measures fit orders the visits by their place in the schedule.", "",
          frame=full[full["AVISIT"] != "Unscheduled"], exit=0, recorded=True, argv=CASE_RUN,
          files={"plan.yaml": without_days}, ok=["mmrm_primary", "ancova_observed"])

    def spatial_without_days(path: Path) -> None:
        without_days(path)
        text = path.read_text(encoding="utf-8").replace("covariance: [unstructured, ar1]",
                                                        "covariance: [unstructured, spatial_exponential]")
        path.write_text(text, encoding="utf-8")

    _case("plan_spatial_structure_without_days", "spatial_exponential with visits that have no planned day.",
          "'spatial_exponential' needs every visit's planned day", argv=["check", "{case}/plan.yaml"],
          files={"plan.yaml": spatial_without_days})

    _case("plan_yaml_tag_on_a_mapping", "A custom YAML tag on the study mapping.",
          "the yaml tag '!study' is not allowed in a plan", argv=["check", "{case}/plan.yaml"],
          files={"plan.yaml": _plan_edit(("study:\n  id: LVT-201", "study: !study\n  id: LVT-201"))})

    unsafe_study = _plan_edit(("  id: LVT-201", "  id: LVT/201"))
    _case("plan_study_id_not_a_folder_name", "A study id with a path separator: 'check' refuses it, "
          "since no run could ever be recorded under it.", "the study id 'LVT/201' cannot be used as a folder name",
          argv=["check", "{case}/plan.yaml"], files={"plan.yaml": unsafe_study})
    _case("lock_study_id_not_a_folder_name", "'lock' refuses a study id that can never run.",
          "the study id 'LVT/201' cannot be used", argv=["lock", "{case}/plan.yaml", "--by", "tester", "--reason",
                                                          "case"], files={"plan.yaml": unsafe_study})

    _case("check_plan_edited_after_lock", "'check' on a plan edited after locking: it still shows what the plan "
          "declares, and exits 2 as 'run' would, naming the change.", "changed since it was locked",
          argv=["check", "{case}/plan.yaml"], files={"plan.yaml": _plan_edit()}, lock_first=True,
          edit_after_lock=[{"file": "plan.yaml", "old": "seed: 7", "new": "seed: 8"}])
    _case("lock_amendment_same_version", "Locking an edited plan under the version already locked is refused "
          "with the version line: an amendment needs a version of its own.", "was already locked",
          argv=["lock", "{case}/plan.yaml", "--by", "tester", "--reason", "amendment"], files={"plan.yaml": _plan_edit()},
          lock_first=True, edit_after_lock=[{"file": "plan.yaml", "old": "seed: 7", "new": "seed: 8"}])
    _case("check_plan_not_locked_yet", "'check' on a valid plan that is simply not locked yet exits 0.", "",
          argv=["check", "{case}/plan.yaml"], exit=0, files={"plan.yaml": _plan_edit()})

    absent_data = [a.replace("{case}/data.csv", "{case}/absent.csv") for a in RUN]
    _case("run_unsafe_cut_label", "A cut label with '..' is refused before the data are read (the data "
          "file named here does not even exist).", "the cut '../c1' cannot be used as a folder name",
          argv=[a.replace("c1", "../c1") for a in absent_data])
    _case("run_output_root_is_a_file", "--out names a file: refused before the data are read.",
          "is a file, not a folder", argv=[a.replace("{out}", "{case}/case.yaml") for a in absent_data])
    _case("run_dummy_arms_negative", "A negative seed for dummy arms.", "--dummy-arms: expected a whole number "
          "of at least 0, got -5", argv=RUN + ["--dummy-arms", "-5"])
    _case("run_workers_zero", "Zero worker processes.", "--workers: expected a whole number of at least 1",
          argv=RUN + ["--workers", "0"])
    _case("run_workers_too_many", "More worker processes than a machine could start.",
          "--workers: expected a whole number of at most 256, got 100000", argv=RUN + ["--workers", "100000"])
    _case("run_scheduler_malformed", "A scheduler address that is not HOST:PORT.",
          "the scheduler address 'tcp://nowhere' is not valid", argv=absent_data + ["--scheduler", "tcp://nowhere"])
    _case("run_scheduler_not_listening", "Nothing listens at the scheduler address (port 1 of this machine): "
          "refused in seconds, before the data are read.", "no Dask scheduler answers at 127.0.0.1:1",
          argv=absent_data + ["--scheduler", "127.0.0.1:1"])


if __name__ == "__main__":
    import sys

    if sys.argv[1:] == ["issue10"]:
        build_issue10()       # only the cases of issue 10; leaves the older cases as they are
    else:
        build()
        build_issue10()
