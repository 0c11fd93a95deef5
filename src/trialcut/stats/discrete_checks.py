"""Argument and data checks shared by the binary and count analyses (one place, one pass).

Every problem found is collected and raised once as a ``ModelSpecificationError`` (exit 2 at
the command line) naming the column and the first offending rows.
"""
from __future__ import annotations

from typing import Any, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem


def require_columns(data: pd.DataFrame, roles: dict[str, Any], problems: list[Problem]) -> None:
    if not isinstance(data, pd.DataFrame):
        raise ModelSpecificationError("data: expected a pandas DataFrame",
                                      [Problem("stats.data", "data must be a pandas DataFrame",
                                               field="data", got=type(data).__name__)])
    for role, column in roles.items():
        columns = column if isinstance(column, (tuple, list)) else (column,)
        for name in columns:
            if name is not None and name not in data.columns:
                problems.append(Problem("stats.missing_column", f"{role}: column {name!r} is not in the data",
                                        field=role, expected="a column of the data", got=repr(name)))


def check_reference(data: pd.DataFrame, arm: str, reference: Any, problems: list[Problem]) -> None:
    if arm not in data.columns:
        return
    arms = list(pd.unique(data[arm].dropna()))
    if reference not in arms:
        problems.append(Problem("stats.reference", f"reference arm {reference!r} is not a value of {arm!r}",
                                field="reference", expected=", ".join(map(str, arms)), got=repr(reference)))
    elif len(arms) < 2:
        problems.append(Problem("stats.one_arm", f"column {arm!r} holds only one arm",
                                field="arm", expected="at least two arms", got=repr(arms)))


def check_binary(data: pd.DataFrame, outcome: str, problems: list[Problem]) -> None:
    if outcome not in data.columns:
        return
    values = pd.to_numeric(data[outcome], errors="coerce").to_numpy(dtype=float)
    given = data[outcome].notna().to_numpy()
    _report(data, outcome, given & ~np.isin(values, (0.0, 1.0)), problems, "stats.binary_values",
            f"outcome {outcome!r} must be 0 (no response) or 1 (response)", "0 or 1")


def check_counts(data: pd.DataFrame, outcome: str, problems: list[Problem]) -> None:
    if outcome not in data.columns:
        return
    values = pd.to_numeric(data[outcome], errors="coerce").to_numpy(dtype=float)
    given = data[outcome].notna().to_numpy()
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(values) & (values >= 0) & (np.floor(values) == values)
    _report(data, outcome, given & ~ok, problems, "stats.count_values",
            f"outcome {outcome!r} must hold counts (whole numbers, 0 or more)", "whole numbers >= 0")


def _report(data, column, bad: np.ndarray, problems, code, message, expected) -> None:
    if bad.any():
        rows = data.index[bad]
        problems.append(Problem(code, message, field=column, expected=expected,
                                got=", ".join(sorted({repr(v) for v in data.loc[rows[:5], column]})),
                                rows=tuple(int(i) for i in rows[:10])))


def check_exposure(data: pd.DataFrame, exposure: str | None, problems: list[Problem]) -> None:
    if exposure is None or exposure not in data.columns:
        return
    values = pd.to_numeric(data[exposure], errors="coerce").to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        bad = ~(np.isfinite(values) & (values > 0))
    _report(data, exposure, bad, problems, "stats.exposure_values",
            f"exposure {exposure!r} must be a positive time", "a number > 0")


def check_choice(value: Any, name: str, allowed: Sequence[str], problems: list[Problem]) -> None:
    if value not in allowed:
        problems.append(Problem(f"stats.{name}", f"{name} is not one of the known choices",
                                field=name, expected=" or ".join(map(str, allowed)), got=repr(value)))


def raise_if(problems: list[Problem], what: str) -> None:
    if problems:
        raise ModelSpecificationError(f"{what}: {problems[0].render()}"
                                      + (f" (+{len(problems) - 1} more)" if len(problems) > 1 else ""),
                                      problems)


def covariate_block(frame: pd.DataFrame, covariates: Sequence[str], levels: dict[str, tuple] | None = None
                    ) -> tuple[np.ndarray, list[str], dict[str, tuple]]:
    """Numeric covariates as they are; categorical ones as indicators of every level but the first.

    Returns the block, plain labels for its columns and the levels used (so that counterfactual
    rows built later code the same way).
    """
    blocks, labels, used = [], [], {}
    for column in covariates:
        series = frame[column]
        if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series) \
                and (levels is None or column not in levels):
            blocks.append(series.to_numpy(dtype=float)[:, None])
            labels.append(str(column))
            continue
        column_levels = levels[column] if levels and column in levels else tuple(sorted(series.dropna().unique(), key=str))
        used[column] = column_levels
        for level in column_levels[1:]:
            blocks.append((series == level).to_numpy(dtype=float)[:, None])
            labels.append(f"{column}: {level} vs {column_levels[0]}")
    block = np.hstack(blocks) if blocks else np.empty((len(frame), 0))
    return block, labels, used
