"""Turn DataFrames into the plain table form of results.json, losslessly.

A table is ``{"title": str, "columns": [...], "data": [[...], ...]}``.  Floats are kept
as Python floats (``json`` writes their shortest round-tripping repr), NaN and missing
become ``None``, numpy scalars become Python scalars.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd


def plain(value: Any) -> Any:
    """A JSON-able Python value for one cell or a nested structure."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        number = float(value)
        return None if math.isnan(number) or math.isinf(number) else number
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        if value.ndim == 1 and value.dtype.kind in "fiub":   # e.g. a fit's residuals: the whole array at once
            return _plain_column(pd.Series(value))
        return [plain(v) for v in value.tolist()]
    if isinstance(value, pd.DataFrame):
        return table(value)
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return value


def table(frame: pd.DataFrame, title: str | None = None) -> dict[str, Any]:
    frame = frame.reset_index(drop=True)
    # Column by column (a residual table of a large cut has hundreds of thousands of cells).
    columns = [_plain_column(frame.iloc[:, position]) for position in range(frame.shape[1])]
    return {
        "title": title or "",
        "columns": [str(c) for c in frame.columns],
        "data": [list(row) for row in zip(*columns)] if columns else [[] for _ in range(len(frame))],
    }


def _plain_column(column: pd.Series) -> list[Any]:
    """:func:`plain` of every value of a column; numpy float, integer and bool columns at once."""
    dtype = column.dtype
    if isinstance(dtype, np.dtype) and dtype.kind == "f":
        values = column.to_numpy(dtype=float)
        out = np.asarray(values.tolist(), dtype=object)
        out[~np.isfinite(values)] = None
        return out.tolist()
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        return column.to_numpy().tolist()
    if isinstance(dtype, np.dtype) and dtype.kind == "b":
        return column.to_numpy().tolist()
    return [plain(v) for v in column.tolist()]


def frame_of(table_dict: dict[str, Any]) -> pd.DataFrame:
    """The inverse of :func:`table` (None comes back as NaN in numeric columns)."""
    return pd.DataFrame(table_dict["data"], columns=table_dict["columns"])
