"""A binary endpoint read from a flag column: Y/N or 1/0 by default, or the plan's own two values.

Source: common practice — analysis datasets flag responders as Y/N (CDISC ADaM's *FL
convention) or with words of the sponsor's own (e.g. Responder / Non-responder), which the
plan must then name.
"""
from types import SimpleNamespace

import pandas as pd
import pytest

from trialcut.data.derive_responder import _read_flags
from trialcut.errors import DataError

DATA = SimpleNamespace(subject="USUBJID", visit="AVISIT")


def _frame(values):
    return pd.DataFrame({"USUBJID": [f"P{i}" for i in range(len(values))], "AVISIT": "Week 4", "RSP": values})


def test_default_flags_read_as_one_and_zero():
    read = _read_flags(_frame(["Y", "N", None, "1", "0"]), "RSP", DATA, "cut.csv")
    assert read.tolist()[:2] == [1.0, 0.0] and pd.isna(read.iloc[2]) and read.tolist()[3:] == [1.0, 0.0]


def test_the_plans_two_values_replace_the_default_ones():
    read = _read_flags(_frame(["Responder", " Non-responder", None]), "RSP", DATA, "cut.csv",
                       ("Responder", "Non-responder"))
    assert read.tolist()[:2] == [1.0, 0.0] and pd.isna(read.iloc[2])


def test_a_value_outside_the_plans_two_is_named_with_its_row():
    with pytest.raises(DataError) as caught:
        _read_flags(_frame(["Responder", "Y"]), "RSP", DATA, "cut.csv", ("Responder", "Non-responder"))
    problem = caught.value.problems[0]
    assert "Responder or Non-responder" in problem.expected and problem.got == "Y"
    assert problem.rows == ("USUBJID=P1, AVISIT=Week 4",)
