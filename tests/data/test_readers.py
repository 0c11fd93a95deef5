"""Readers: CSV with line numbers, Parquet, CDISC Dataset-JSON v1.1 and their failures.

Dataset-JSON v1.1 layout (top-level attributes, column attributes, rows as arrays,
decimals as strings): from memory of the CDISC Dataset-JSON v1.1 specification.
Hashes are checked against Python's hashlib (a general-purpose reference library).
"""
from __future__ import annotations

import hashlib
import json

import numpy as np
import pandas as pd
import pytest

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import read_cut, write_dataset_json
from trialcut.errors import DataError

from .conftest import frame_of, participant


@pytest.fixture
def small_frame() -> pd.DataFrame:
    return frame_of(participant("S1", "Placebo", 30, 28, 25), participant("S2", "Active", 40, 35, None))


def test_csv_is_read_as_text_with_a_manifest(tmp_path, small_frame):
    path = tmp_path / "cut.csv"
    small_frame.to_csv(path, index=False)
    raw = read_cut(path)
    assert raw.manifest["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert raw.manifest["rows"] == len(small_frame) and raw.manifest["format"] == "csv"
    assert raw.manifest["columns"] == list(small_frame.columns)
    assert raw.first_row == 2 and not raw.typed
    assert raw.frame["AVAL"].tolist()[:2] == ["30.0", "28.0"]      # text, exactly as written


def test_non_numeric_value_is_reported_with_its_csv_line(tmp_path, small_frame, plan):
    frame = small_frame.astype(object)
    frame.loc[3, "AVAL"] = "forty"                   # fourth record: line 5 (header is line 1)
    path = tmp_path / "cut.csv"
    frame.to_csv(path, index=False)
    with pytest.raises(DataError) as caught:
        prepare_cut(plan, read_cut(path))
    problem = next(p for p in caught.value.problems if p.field == "AVAL")
    assert problem.file == str(path)
    assert problem.rows[0].startswith("line 5 (S2, Baseline)")
    assert "'forty'" in problem.rows[0]


def test_parquet_round_trip_keeps_types(tmp_path, small_frame, plan):
    path = tmp_path / "cut.parquet"
    small_frame.to_parquet(path, index=False)
    raw = read_cut(path)
    assert raw.typed and raw.first_row == 1
    pd.testing.assert_frame_equal(raw.frame, small_frame, check_dtype=False)
    assert prepare_cut(plan, raw).summary()["participants"] == 2


def test_parquet_with_text_in_a_numeric_column_is_refused(tmp_path, small_frame, plan):
    frame = small_frame.assign(AVAL=small_frame["AVAL"].astype(str))
    path = tmp_path / "cut.parquet"
    frame.to_parquet(path, index=False)
    with pytest.raises(DataError) as caught:
        prepare_cut(plan, read_cut(path))
    assert "AVAL holds values that are not numbers" in caught.value.render()
    assert "record 1" in caught.value.render()


def test_dataset_json_round_trip(tmp_path, small_frame):
    frame = small_frame.assign(ADY=small_frame["ADY"].astype("int64"), AVAL=small_frame["AVAL"].astype(float),
                               flagged=small_frame["AVAL"] > 30)
    path = write_dataset_json(frame, tmp_path / "cut.json", created="2026-01-01T00:00:00Z")
    document = json.loads(path.read_text())
    assert document["datasetJSONVersion"] == "1.1.0" and document["records"] == len(frame)
    types = {c["name"]: c["dataType"] for c in document["columns"]}
    assert types["ADY"] == "integer" and types["AVAL"] == "double" and types["USUBJID"] == "string"
    assert types["flagged"] == "boolean"
    raw = read_cut(path)
    assert raw.manifest["format"] == "dataset-json"
    back = raw.frame
    assert back["AVAL"].tolist() == frame["AVAL"].tolist()
    assert back["ADY"].tolist() == frame["ADY"].astype(float).tolist()
    assert back["flagged"].tolist() == frame["flagged"].tolist()
    # None and NaN both travel as null.
    assert back["DISCDY"].isna().all() and back["ABLFL"].isna().sum() == frame["ABLFL"].isna().sum()


def test_dataset_json_is_byte_reproducible(tmp_path, small_frame):
    first = write_dataset_json(small_frame, tmp_path / "a.json", created="2026-01-01T00:00:00Z")
    second = write_dataset_json(small_frame, tmp_path / "b.json", created="2026-01-01T00:00:00Z")
    assert first.read_bytes() == second.read_bytes()


def test_dataset_json_decimals_as_strings_are_numbers(tmp_path):
    document = _document([["S1", "12.50"], ["S2", None]], [("USUBJID", "string"), ("AVAL", "decimal")])
    path = tmp_path / "cut.json"
    path.write_text(json.dumps(document))
    values = read_cut(path).frame["AVAL"]
    assert values.iloc[0] == 12.5 and np.isnan(values.iloc[1])


def _document(rows, columns, **changes):
    document = {"datasetJSONCreationDateTime": "2026-01-01T00:00:00", "datasetJSONVersion": "1.1.0",
                "itemGroupOID": "IG.ADEFF", "records": len(rows), "name": "ADEFF", "label": "Efficacy",
                "columns": [{"itemOID": f"IT.{n}", "name": n, "label": n, "dataType": t} for n, t in columns],
                "rows": rows}
    document.update(changes)
    return document


@pytest.mark.parametrize("mutation, fragment", [
    (lambda d: d.pop("columns"), "required top-level attributes are missing"),
    (lambda d: d.update(rows={"S1": 1}), "'rows' must be a list"),
    (lambda d: d["columns"][1].pop("dataType"), "lacks required attributes"),
    (lambda d: d["columns"][1].update(dataType="number"), "unknown dataType"),
    (lambda d: d["rows"][0].append("extra"), "each row must be an array of 2 values"),
    (lambda d: d["rows"][1].__setitem__(1, "high"), "do not fit column AVAL"),
    (lambda d: d.update(records=5), "'records' does not match"),
    (lambda d: d["columns"].append(dict(d["columns"][0])), "column name used twice"),
])
def test_dataset_json_structure_errors(tmp_path, mutation, fragment):
    document = _document([["S1", 12.0], ["S2", 14.0]], [("USUBJID", "string"), ("AVAL", "double")])
    mutation(document)
    path = tmp_path / "cut.json"
    path.write_text(json.dumps(document))
    with pytest.raises(DataError) as caught:
        read_cut(path)
    assert fragment in caught.value.render()
    assert str(path) in caught.value.render()


def test_not_json_at_all(tmp_path):
    path = tmp_path / "cut.json"
    path.write_text("{'columns': [")
    with pytest.raises(DataError, match="cannot read"):
        read_cut(path)


@pytest.mark.parametrize("name, content, code", [
    ("cut.xlsx", b"PK", "data.unknown_format"),
    ("cut.csv", b"", "data.empty"),
    ("cut.csv", b"  \n\n", "data.empty"),
    ("cut.csv", b"USUBJID,AVAL\n", "data.no_records"),
    ("cut.csv", b"USUBJID,AVAL,AVAL\nS1,1,2\n", "data.bad_header"),
    ("cut.csv", b"USUBJID,AVAL\nS1,1,2,3\n", "data.malformed_csv"),
    ("cut.csv", b"USUBJID,AVAL\n\xff\xfe,1\n", "data.encoding"),
    ("cut.parquet", b"not a parquet file", "data.malformed_parquet"),
])
def test_unreadable_inputs(tmp_path, name, content, code):
    path = tmp_path / name
    path.write_bytes(content)
    with pytest.raises(DataError) as caught:
        read_cut(path)
    (problem,) = caught.value.problems
    assert problem.code == code and problem.file == str(path) and problem.hint


def test_missing_file(tmp_path):
    with pytest.raises(DataError) as caught:
        read_cut(tmp_path / "absent.csv")
    assert caught.value.problems[0].code == "data.not_found"


def test_dataset_json_version_1_0_layout_is_named(tmp_path):
    # v1.0 kept rows under clinicalData/itemGroupData (from memory of the v1.0 specification).
    path = tmp_path / "cut.json"
    path.write_text(json.dumps({"creationDateTime": "2026-01-01T00:00:00", "datasetJSONVersion": "1.0.0",
                                "clinicalData": {"itemGroupData": {}}}))
    with pytest.raises(DataError) as caught:
        read_cut(path)
    assert caught.value.problems[0].code == "data.dataset_json_version"


def test_a_data_file_beyond_the_size_limit_is_refused_before_reading(tmp_path, monkeypatch, capsys):
    # issue 10: size limits with a clear message; the limit is lowered here so the test stays small.
    from trialcut.cli import main
    from trialcut.data import readers

    monkeypatch.setattr(readers, "MAX_DATA_BYTES", 1 << 20)
    path = tmp_path / "cut.csv"
    path.write_bytes(b"USUBJID,AVAL\n" + b"S1,1\n" * 300_000)
    plan = readers.Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"
    status = main(["run", str(plan), "--data", str(path), "--cut", "c1", "--out", str(tmp_path / "out"), "--unlocked"])
    err = capsys.readouterr().err
    assert status == 2
    assert "the data file is larger than trialcut reads; expected at most 1 MB; got 1.4 MB" in err


def test_a_tab_separated_file_gets_a_delimiter_hint(tmp_path):
    path = tmp_path / "cut.csv"
    path.write_text("USUBJID\tAVAL\nS1\t1\n", encoding="utf-8")
    with pytest.raises(DataError) as caught:
        read_cut(path)
    assert "separates its fields with tabs" in caught.value.render()


def test_non_utf8_dataset_json_is_located(tmp_path):
    path = tmp_path / "cut.json"
    path.write_bytes(b'{\n  "name": "caf\xe9"\n}')
    with pytest.raises(DataError) as caught:
        read_cut(path)
    problem = caught.value.problems[0]
    assert (problem.code, problem.line, problem.column) == ("data.encoding", 2, 15)
