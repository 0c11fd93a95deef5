"""Descriptive summaries of a repeatedly measured endpoint: by arm and visit, and of what is missing.

The input is a long frame, one row per participant and scheduled visit (a missing outcome is
NaN or the row is absent).  Nothing here models anything; the tables are what a reviewer
reads before the model's results.

Quartiles use numpy's default definition (linear interpolation between order statistics,
definition 7 of Hyndman & Fan 1996, "Sample quantiles in statistical packages", The American
Statistician 50:361-365).  Other definitions give slightly different quartiles in small
samples, so the tables carry the definition in ``DataFrame.attrs["quantile_definition"]``
(stating it is common practice).
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem

QUANTILE_DEFINITION = (
    "linear interpolation between order statistics "
    "(Hyndman & Fan 1996 definition 7; numpy's default)"
)
OBSERVED_MARK = "X"
MISSING_MARK = "."

SUMMARY_COLUMNS = ("arm", "visit", "variable", "n", "mean", "sd", "median", "q1", "q3", "min", "max")
MISSING_COLUMNS = ("arm", "visit", "expected", "observed", "missing", "percent_missing")
PATTERN_COLUMNS = ("arm", "pattern", "count", "share", "monotone")
RESPONSE_COLUMNS = ("arm", "visit", "n", "responders", "proportion")


def describe_by_arm_visit(
    frame: pd.DataFrame,
    *,
    subject: str,
    arm: str,
    visit: str,
    columns: Sequence[str] = ("AVAL", "CHG"),
    visits: Sequence | None = None,
    arms: Sequence | None = None,
) -> pd.DataFrame:
    """n, mean, sd (n-1 divisor), median, quartiles, min and max per arm x visit x variable.

    ``visits`` and ``arms`` give the row order; ``None`` takes the order of first appearance.
    A cell with no observed value has n = 0 and NaN statistics.
    """
    columns = tuple(columns)
    rows = []
    for arm_level, visit_level, part in _cells(frame, subject, arm, visit, columns, visits, arms):
        for column in columns:
            values = np.array([], dtype=float) if part is None else _numeric(part[column], column)
            rows.append((arm_level, visit_level, column, *_summary(values)))
    table = pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS))
    table.attrs["quantile_definition"] = QUANTILE_DEFINITION
    return table


def responders_by_arm_visit(
    frame: pd.DataFrame,
    *,
    subject: str,
    arm: str,
    visit: str,
    column: str,
    visits: Sequence | None = None,
    arms: Sequence | None = None,
) -> pd.DataFrame:
    """n with a 0/1 response, responders and their proportion per arm x visit.

    A binary endpoint's mean and quartiles of 0/1 values say nothing a reader needs; the count
    of responders over those with a response is the usual summary (common practice).  A cell
    with no response has n = 0 and a NaN proportion.
    """
    rows = []
    for arm_level, visit_level, part in _cells(frame, subject, arm, visit, (column,), visits, arms):
        values = np.array([], dtype=float) if part is None else _numeric(part[column], column)
        values = values[~np.isnan(values)]
        responders = int((values == 1).sum())
        rows.append((arm_level, visit_level, int(values.size), responders,
                     responders / values.size if values.size else float("nan")))
    return pd.DataFrame(rows, columns=list(RESPONSE_COLUMNS))


def _cells(frame, subject, arm, visit, columns, visits, arms):
    """(arm level, visit level, rows or None) for every arm x visit in order, after checking the frame."""
    _require_columns(frame, (subject, arm, visit, *columns))
    _require_one_row_per_visit(frame, subject, visit)
    visits = _ordered_levels(frame, visit, visits)
    groups = {key: part for key, part in frame.groupby([arm, visit], sort=False, observed=True)}
    for arm_level in _ordered_levels(frame, arm, arms):
        for visit_level in visits:
            yield arm_level, visit_level, groups.get((arm_level, visit_level))


def missing_by_visit(
    frame: pd.DataFrame,
    *,
    subject: str,
    arm: str,
    visit: str,
    outcome: str,
    visits: Sequence | None = None,
    arms: Sequence | None = None,
) -> pd.DataFrame:
    """Per arm and visit: participants expected (everyone in the arm), observed, missing, percent.

    Every participant in the frame is expected at every visit: a participant with no row for a
    visit counts as missing there, the same as a row whose outcome is NaN.
    """
    observed = _observed_grid(frame, subject, arm, visit, outcome, visits, arms)
    rows = []
    for arm_level in observed.arms:
        in_arm = observed.subject_arms == arm_level
        expected = int(in_arm.sum())
        for position, visit_level in enumerate(observed.visits):
            n_observed = int(observed.grid[in_arm, position].sum())
            n_missing = expected - n_observed
            percent = 100.0 * n_missing / expected if expected else float("nan")
            rows.append((arm_level, visit_level, expected, n_observed, n_missing, percent))
    return pd.DataFrame(rows, columns=list(MISSING_COLUMNS))


def missing_patterns(
    frame: pd.DataFrame,
    *,
    subject: str,
    arm: str,
    visit: str,
    outcome: str,
    visits: Sequence | None = None,
    arms: Sequence | None = None,
) -> pd.DataFrame:
    """Participants per arm and pattern of observed visits.

    A pattern has one mark per visit in visit order: ``X`` observed, ``.`` missing, so
    ``XX..`` is a participant seen at the first two visits only.  ``share`` is the
    proportion of the arm's participants; ``monotone`` is true when no visit is observed
    after a missing one (dropout without return).  Within an arm the most common pattern
    comes first.
    """
    observed = _observed_grid(frame, subject, arm, visit, outcome, visits, arms)
    patterns = np.array(
        ["".join(OBSERVED_MARK if seen else MISSING_MARK for seen in row) for row in observed.grid],
        dtype=object,
    )
    rows = []
    for arm_level in observed.arms:
        in_arm = patterns[observed.subject_arms == arm_level]
        counts = pd.Series(in_arm, dtype=object).value_counts()
        ordered = sorted(counts.items(), key=lambda item: (-item[1], item[0]))
        for pattern, count in ordered:
            rows.append((arm_level, pattern, int(count), count / len(in_arm), _is_monotone(pattern)))
    return pd.DataFrame(rows, columns=list(PATTERN_COLUMNS))


# --- helpers -------------------------------------------------------------------------------


class _ObservedGrid:
    """Participants x visits booleans (True = outcome observed) and each participant's arm."""

    def __init__(self, grid: np.ndarray, subject_arms: np.ndarray, visits: list, arms: list):
        self.grid = grid
        self.subject_arms = subject_arms
        self.visits = visits
        self.arms = arms


def _observed_grid(frame, subject, arm, visit, outcome, visits, arms) -> _ObservedGrid:
    _require_columns(frame, (subject, arm, visit, outcome))
    _require_one_row_per_visit(frame, subject, visit)
    _require_one_arm_per_subject(frame, subject, arm)
    visits = _ordered_levels(frame, visit, visits)
    arms = _ordered_levels(frame, arm, arms)
    subject_arms = frame.groupby(subject, sort=True, observed=True)[arm].first()
    seen = frame.loc[frame[outcome].notna() & frame[visit].isin(visits), [subject, visit]]
    grid = pd.crosstab(seen[subject], seen[visit]).reindex(
        index=subject_arms.index, columns=visits, fill_value=0
    )
    return _ObservedGrid(grid.to_numpy() > 0, subject_arms.to_numpy(), visits, arms)


def _summary(values: np.ndarray) -> tuple:
    values = values[~np.isnan(values)]
    n = values.size
    if n == 0:
        return (0, *([float("nan")] * 7))
    sd = float(np.std(values, ddof=1)) if n > 1 else float("nan")
    q1, median, q3 = np.quantile(values, [0.25, 0.5, 0.75])
    return (n, float(values.mean()), sd, float(median), float(q1), float(q3),
            float(values.min()), float(values.max()))


def _is_monotone(pattern: str) -> bool:
    return OBSERVED_MARK not in pattern.lstrip(OBSERVED_MARK)


def _numeric(series: pd.Series, column: str) -> np.ndarray:
    try:
        return pd.to_numeric(series, errors="raise").to_numpy(dtype=float)
    except (TypeError, ValueError) as error:
        raise ModelSpecificationError(
            f"column {column!r} is not numeric",
            [Problem(code="stats.not_numeric", message="a summarised column must hold numbers",
                     field=column, expected="numbers or missing values", got=str(error))],
        ) from None


def _ordered_levels(frame: pd.DataFrame, column: str, given: Sequence | None) -> list:
    present = list(pd.unique(frame[column].dropna()))
    if given is None:
        return present
    given = list(given)
    unknown = [level for level in present if level not in given]
    if unknown:
        raise ModelSpecificationError(
            f"column {column!r} has values outside the levels given",
            [Problem(code="stats.unknown_level", message="every value must be one of the levels given",
                     field=column, expected=", ".join(map(str, given)),
                     got=", ".join(map(str, unknown)))],
        )
    return given


def _require_columns(frame: pd.DataFrame, names: Sequence[str]) -> None:
    missing = [name for name in dict.fromkeys(names) if name not in frame.columns]
    if missing:
        raise ModelSpecificationError(
            "the data lack columns the summary needs",
            [Problem(code="stats.missing_column", message=f"no column {name!r}", field=name,
                     expected="a column of the data", got=", ".join(map(str, frame.columns)))
             for name in missing],
        )


def _require_one_row_per_visit(frame: pd.DataFrame, subject: str, visit: str) -> None:
    duplicated = frame.duplicated([subject, visit], keep=False)
    if duplicated.any():
        rows = tuple(frame.loc[duplicated, [subject, visit]].itertuples(index=False, name=None))
        raise ModelSpecificationError(
            "a participant has more than one row for a visit",
            [Problem(code="stats.duplicate_visit", message="one row per participant and visit expected",
                     field=f"{subject} x {visit}", rows=rows)],
        )


def _require_one_arm_per_subject(frame: pd.DataFrame, subject: str, arm: str) -> None:
    arms_per_subject = frame.groupby(subject, observed=True)[arm].nunique()
    mixed = arms_per_subject[arms_per_subject > 1]
    if len(mixed):
        raise ModelSpecificationError(
            "a participant appears in more than one arm",
            [Problem(code="stats.arm_changes", message="a participant's arm must be the same on every row",
                     field=arm, rows=tuple(mixed.index))],
        )
