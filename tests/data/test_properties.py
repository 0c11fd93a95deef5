"""Property: whatever is done to a valid cut (columns dropped or renamed, cells replaced by
text, NaN, infinity or absurd numbers, rows repeated or shuffled, everything turned into
text), prepare_cut either succeeds or raises DataError, never any other exception; and a cut
it accepts can always produce its analysis data and tables.  (Common practice for input
validation: bad input must surface as a reported input error, not a crash.)"""
from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trialcut.data.prepare import prepare_cut
from trialcut.data.readers import raw_from_frame
from trialcut.errors import DataError

from .conftest import frame_of, make_plan, participant

PLANS = {True: make_plan(), False: make_plan(visits={"windowing": False})}
BASE = frame_of(participant("S1", "Placebo", 30, 28, 25, disc=20),
                participant("S2", "Active", 40, 35, None, resc=14, pp="N"),
                participant("S3", "Active", 33, 30, 29, stratum="Severe")).astype(object)
COLUMNS = list(BASE.columns)
ODD_VALUES = ["x", "", " ", np.nan, None, np.inf, -np.inf, 1e308, -5.0, 0, True, "Y", "Week 2",
              "Baseline", "Placebo", 15.0, "1,5", "inf", "nan", "\u00e9",
              # what a typed file can hold (issue 10): dates and times, bytes, nested values
              pd.Timestamp("2020-01-01"), pd.NaT, pd.Timestamp("2020-01-01").date(), b"Week 2", ["S1"],
              {"arm": "Placebo"}, 1e200, -1e-300]

mutation = st.one_of(
    st.tuples(st.just("drop"), st.sampled_from(COLUMNS)),
    st.tuples(st.just("set"), st.integers(0, 100), st.sampled_from(COLUMNS), st.sampled_from(ODD_VALUES)),
    st.tuples(st.just("repeat"), st.integers(0, 100)),
    st.tuples(st.just("shuffle"), st.integers(0, 2**16)),
    st.tuples(st.just("rename"), st.sampled_from(COLUMNS)),
    st.tuples(st.just("remove"), st.integers(0, 100)),
)


def _apply(frame: pd.DataFrame, change) -> pd.DataFrame:
    kind = change[0]
    if len(frame) == 0:
        return frame
    if kind == "drop" and change[1] in frame.columns:
        return frame.drop(columns=change[1])
    if kind == "set" and change[2] in frame.columns:
        frame = frame.copy()
        frame.iat[change[1] % len(frame), frame.columns.get_loc(change[2])] = change[3]
        return frame
    if kind == "repeat":
        return pd.concat([frame, frame.iloc[[change[1] % len(frame)]]], ignore_index=True)
    if kind == "shuffle":
        return frame.sample(frac=1, random_state=change[1]).reset_index(drop=True)
    if kind == "rename" and change[1] in frame.columns:
        return frame.rename(columns={change[1]: change[1].lower()})
    if kind == "remove":
        return frame.drop(index=frame.index[change[1] % len(frame)]).reset_index(drop=True)
    return frame


def _exercise(frame: pd.DataFrame, typed: bool, windowing: bool) -> None:
    try:
        cut = prepare_cut(PLANS[windowing], raw_from_frame(frame, typed=typed), dummy_arms_seed=3)
    except DataError as error:
        assert error.problems and error.render()
        return
    for estimand in ("policy", "hypo", "comp"):
        data = cut.analysis_data("score", estimand)
        assert len(data.frame) == len(cut.subjects[cut.subjects["FASFL"] == "Y"]) * 2
        assert not data.frame.duplicated(["USUBJID", "AVISIT"]).any()
    cut.disposition()
    cut.population_counts()
    cut.conformance.to_frame()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(mutation, min_size=1, max_size=4), st.booleans(), st.booleans())
def test_prepare_cut_raises_only_data_errors(changes, as_text, windowing):
    frame = BASE
    for change in changes:
        frame = _apply(frame, change)
    if as_text:
        # What a CSV reader hands over: every cell text, missing as NaN.
        frame = frame.map(lambda v: v if v is None or (isinstance(v, float) and np.isnan(v)) else str(v))
    _exercise(frame, typed=not as_text, windowing=windowing)


@settings(max_examples=60, deadline=None)
@given(st.sampled_from([".csv", ".json", ".parquet"]),
       st.one_of(st.binary(max_size=200),
                 st.text(alphabet='USBJIDAVL,\n"{}[]:0123456789.- ', max_size=200).map(str.encode)))
def test_read_cut_raises_only_data_errors_on_arbitrary_bytes(tmp_path_factory, suffix, content):
    from trialcut.data.readers import read_cut

    path = tmp_path_factory.mktemp("bytes") / f"cut{suffix}"
    path.write_bytes(content)
    try:
        raw = read_cut(path)
    except DataError as error:
        assert error.problems and error.problems[0].file == str(path)
        return
    assert raw.manifest["rows"] == len(raw.frame) > 0


# --------------------------------------------------------------------------- issue 10: the command line
# Whatever bytes a data file holds, 'trialcut run' ends with exit 2 and a message naming the
# file, never with exit 3 (an internal fault).  Run through trialcut.cli.main, as a user would.
_BASE_PLAN = __import__("pathlib").Path(__file__).resolve().parents[1] / "cases" / "_base" / "plan.yaml"
_CSV_HEADER = "USUBJID,TRT01P,AVISIT,ADY,ABLFL,AVAL,BASE,CHG,FASFL,PARAMCD,STRAT1R,DISCDY\n"


def _run_main(path, out, capsys) -> tuple[int, str]:
    from trialcut.cli import main

    capsys.readouterr()
    status = main(["run", str(_BASE_PLAN), "--data", str(path), "--cut", "c1", "--out", str(out), "--unlocked"])
    return status, capsys.readouterr().err


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.sampled_from([".csv", ".json", ".parquet"]),
       st.one_of(st.binary(max_size=300),
                 st.text(alphabet='USBJIDAVL,;\t\n"{}[]:0123456789.-eE \u00e9', max_size=300).map(str.encode),
                 st.text(max_size=200).map(lambda t: (_CSV_HEADER + t).encode("utf-8", "surrogatepass"))))
def test_run_on_arbitrary_bytes_never_exits_3(tmp_path_factory, capsys, suffix, content):
    folder = tmp_path_factory.mktemp("bytes")
    path = folder / f"cut{suffix}"
    path.write_bytes(content)
    status, err = _run_main(path, folder / "out", capsys)
    assert status == 2, f"exit {status} on {content[:80]!r}: {err}"
    assert str(path) in err and "Traceback" not in err


_JSON_VALUES = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=False), st.text(max_size=8)),
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=6), inner, max_size=4)),
    max_leaves=12)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.sampled_from(["name", "dataType", "itemOID", "rows", "records", "columns", "cell"]), _JSON_VALUES)
def test_dataset_json_with_any_value_in_any_place_never_exits_3(tmp_path_factory, capsys, place, value):
    """A valid Dataset-JSON file with one attribute or one cell replaced by any JSON value."""
    import json

    from trialcut.data.readers import write_dataset_json

    folder = tmp_path_factory.mktemp("json")
    path = write_dataset_json(BASE.infer_objects(), folder / "cut.json", created="2026-01-01T00:00:00Z")
    document = json.loads(path.read_text(encoding="utf-8"))
    if place in ("name", "dataType", "itemOID"):
        document["columns"][1][place] = value
    elif place == "cell":
        document["rows"][2][5] = value
    else:
        document[place] = value
    path.write_text(json.dumps(document), encoding="utf-8")
    status, err = _run_main(path, folder / "out", capsys)
    # The base plan needs columns this small cut lacks, so even an intact cell ends in exit 2.
    assert status == 2, f"exit {status} with {place} = {value!r}: {err}"
    assert str(path) in err and "Traceback" not in err
