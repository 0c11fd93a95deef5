"""Cell-by-cell cleaning of a text column, done once per distinct value.

A data cut repeats a few hundred participant ids, a handful of labels and one date per
participant on thousands of records; cleaning every record through a Python function cost
more than the checks themselves.  :func:`map_distinct` gives exactly ``values.map(function)``
(same values, same dtype) while calling ``function`` once per distinct text.
"""
from __future__ import annotations

from typing import Any, Callable

import numpy as np
import pandas as pd


def map_distinct(values: pd.Series, function: Callable[[Any], Any]) -> pd.Series:
    """``values.map(function)`` for a ``function`` of one cell that returns text or None.

    Only plain text is taken once per distinct value: pandas counts 1, 1.0 and True as one key
    while their text differs, so any other value sends the whole column the general way.  Gaps
    (None, NaN, NA, NaT) go through ``function`` one by one, as they are.
    """
    if not len(values) or not plain_text_dtype(values.dtype):
        return values.map(function)
    try:
        codes, uniques = pd.factorize(values)      # gaps get code -1
    except TypeError:                              # an unhashable cell (a list from a typed file)
        return values.map(function)
    if not all(type(u) is str for u in uniques):
        return values.map(function)
    distinct = [function(u) for u in uniques]
    mapped = np.array(distinct + [None], dtype=object)[codes]
    gaps = np.flatnonzero(codes < 0)
    if len(gaps):
        cells = values.to_numpy(dtype=object)
        mapped[gaps] = filled = [function(cells[i]) for i in gaps]
        distinct += filled
    if not all(v is None or type(v) is str for v in distinct):
        return values.map(function)    # pandas infers the dtype of other results its own way
    return pd.Series(mapped.tolist(), index=values.index, name=values.name)


def plain_text_dtype(dtype) -> bool:
    """Objects, or pandas' default text dtype; the NA-valued text dtype keeps its own results."""
    if isinstance(dtype, pd.StringDtype):
        return dtype.na_value is not pd.NA
    return dtype == object
