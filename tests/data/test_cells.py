"""map_distinct must give exactly what pandas' own Series.map gives (values and dtype).

Reference: pandas' ``Series.map`` (the general-purpose library the shortcut replaces); the
cell functions are the ones the conformance checks and the cut-off reader use.
"""
import datetime as dt

import numpy as np
import pandas as pd
import pytest

from trialcut.data.cells import map_distinct
from trialcut.data.conformance import _clean_text
from trialcut.data.cutoff import _as_text

CELLS = ["a", " a", "a ", "", " ", None, np.nan, pd.NA, pd.NaT, "\u00a0b", "B", "NA", 3, 3.0, True, 1,
         dt.date(2020, 1, 1), "2020-01-01", " 2020-02-03 "]
DTYPES = (object, "str", None, "string", "category")


@pytest.mark.parametrize("seed", range(20))
def test_same_values_and_dtype_as_series_map(seed):
    rng = np.random.default_rng(seed)
    compared = 0
    for _ in range(100):
        size = int(rng.integers(0, 9))
        items = [CELLS[i] for i in rng.integers(0, len(CELLS), size)]
        index = rng.permutation(size) + 5 if size else None
        for dtype in DTYPES:
            for function in (_clean_text, _as_text):
                try:
                    values = pd.Series(items, dtype=dtype, index=index, name="column")
                    expected = values.map(function)
                except (TypeError, ValueError):   # a mix this dtype cannot hold: nothing to compare
                    continue
                try:
                    pd.testing.assert_series_equal(map_distinct(values, function), expected, check_exact=True)
                except AssertionError as error:
                    raise AssertionError(f"seed {seed}, {dtype}, {function.__name__}, {items!r}: {error}") from None
                compared += 1
    assert compared > 500, f"seed {seed}: only {compared} columns compared"


def test_plain_text_calls_the_function_once_per_distinct_value():
    calls = []

    def upper(value):
        calls.append(value)
        return None if value is None else str(value).upper()

    values = pd.Series(["x", "y", "x", None, "x", "y"], dtype=object)
    mapped = map_distinct(values, upper)
    assert sorted(map(str, calls)) == ["None", "x", "y"]
    pd.testing.assert_series_equal(mapped, values.map(upper))


def test_an_unhashable_cell_takes_the_general_way_as_series_map_does():
    # A typed file can hand over a list in a text column; factorize cannot hash it (found by the
    # property test of prepare_cut). The answer is still exactly Series.map's.
    values = pd.Series(["S1", ["S1"], None, "S2"], dtype=object)
    pd.testing.assert_series_equal(map_distinct(values, str), values.map(str), check_exact=True)
