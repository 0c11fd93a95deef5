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
        return [plain(v) for v in value.tolist()]
    if isinstance(value, pd.DataFrame):
        return table(value)
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return value


def table(frame: pd.DataFrame, title: str | None = None) -> dict[str, Any]:
    frame = frame.reset_index(drop=True)
    return {
        "title": title or "",
        "columns": [str(c) for c in frame.columns],
        "data": [[plain(v) for v in row] for row in frame.itertuples(index=False, name=None)],
    }


def frame_of(table_dict: dict[str, Any]) -> pd.DataFrame:
    """The inverse of :func:`table` (None comes back as NaN in numeric columns)."""
    return pd.DataFrame(table_dict["data"], columns=table_dict["columns"])
