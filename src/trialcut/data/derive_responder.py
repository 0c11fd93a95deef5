"""The outcome of a binary or count endpoint, derived from the analysis data of its parameter.

* **Binary.** The response is read from the plan's ``flag_column`` (Y/N or 1/0), or derived
  from the analysed value (change or value, as the endpoint's ``analysed`` says) by a
  threshold and a direction.  A visit whose governing intercurrent event has the composite
  strategy counts as non-response (0), whatever ``composite_value`` the estimand gives the
  continuous score.  A due visit still without a value counts as non-response when the plan's
  ``response.missing`` is ``non_response`` (values set aside by a hypothetical strategy
  included); with ``leave_out`` it stays missing and the analysis leaves it out.
* **Count.** The value is the number of events since the previous visit, and the plan's
  ``exposure`` column the time at risk it covers.  Counts must be whole numbers >= 0 and
  exposures > 0 wherever a count is given.

Bad values stop the run (``DataError``, exit 2) naming the file, the column and the first
participants and visits concerned.
"""
from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import pandas as pd

from trialcut.data.prepare import DUE, AnalysisData
from trialcut.errors import DataError, Problem

RESPONSE = "RESPONSE"
LOG_EXPOSURE = "LOG_EXPOSURE"
FLAG_VALUES = {"Y": 1.0, "N": 0.0, "1": 1.0, "0": 0.0, "1.0": 1.0, "0.0": 0.0, "True": 1.0, "False": 0.0}


@dataclass(frozen=True)
class DiscreteAnalysisData(AnalysisData):
    """AnalysisData of a binary or count endpoint: ``outcome`` names the 0/1 or count column."""

    endpoint_type: str = "binary"
    exposure: str | None = None          # count endpoints: time at risk per row
    log_exposure: str | None = None      # its logarithm, for a model offset
    missing_rule: str | None = None      # binary endpoints: non_response or leave_out
    score: str | None = None             # binary endpoints by threshold: the continuous column derived from
    threshold: float | None = None
    direction: str | None = None


def derive_outcome(endpoint, data: AnalysisData, source: str = "the data cut") -> AnalysisData:
    """The analysis data with the endpoint's own outcome; continuous endpoints pass through."""
    if endpoint.type == "binary":
        return _binary(endpoint, data, source)
    if endpoint.type == "count":
        return _count(endpoint, data, source)
    return data


def _base_fields(data: AnalysisData) -> dict:
    return {f.name: getattr(data, f.name) for f in fields(AnalysisData)}


def _binary(endpoint, data: AnalysisData, source: str) -> DiscreteAnalysisData:
    rule, frame = endpoint.response, data.frame.copy()
    if rule.flag_column is not None:
        response = _read_flags(frame, rule.flag_column, data, source, rule.flag_values)
    else:
        values = frame[data.outcome].astype(float)
        reached = values <= rule.threshold if rule.direction == "at_most" else values >= rule.threshold
        response = reached.astype(float).where(values.notna())
    if "outcome_set_composite" in frame.columns:
        response = response.mask(frame["outcome_set_composite"].astype(bool), 0.0)
    if rule.missing == "non_response" and DUE in frame.columns:
        response = response.mask(response.isna() & frame[DUE].astype(bool), 0.0)
    frame[RESPONSE] = response
    return DiscreteAnalysisData(**(_base_fields(data) | {"frame": frame, "outcome": RESPONSE}),
                                endpoint_type="binary", missing_rule=rule.missing,
                                score=data.outcome if rule.threshold is not None else None,
                                threshold=rule.threshold, direction=rule.direction)


def _read_flags(frame: pd.DataFrame, column: str, data: AnalysisData, source: str,
                labels: tuple[str, str] | None = None) -> pd.Series:
    """The flag column as 1/0: the plan's two values (response first) when it names them, else Y/N or 1/0."""
    values = {labels[0].strip(): 1.0, labels[1].strip(): 0.0} if labels else FLAG_VALUES
    allowed = f"{labels[0]} or {labels[1]} (the plan's flag_values)" if labels else "Y/N or 1/0"
    if column not in frame.columns:
        raise DataError(f"{source}: column {column!r} (the binary endpoint's flag_column) is not in the data", [
            Problem("data.response_column", "the response flag column is missing", file=source, field=column,
                    expected=f"a column of {allowed}", got="no such column")])
    raw = frame[column]
    text = raw.map(lambda v: None if pd.isna(v) or (isinstance(v, str) and not v.strip()) else str(v).strip())
    mapped = text.map(values)
    bad = text.notna() & mapped.isna()
    if bad.any():
        raise DataError(f"{source}: column {column!r} must hold a response ({allowed})", [
            Problem("data.response_values", f"binary outcome values other than {allowed}", file=source,
                    field=column, expected=allowed, got=", ".join(sorted(set(text[bad].head(5)))),
                    rows=_rows(frame, bad, data), hint="name the column's own two values in response.flag_values"
                    if not labels else "correct the values or the plan's flag_values")])
    return mapped.astype(float)


def _count(endpoint, data: AnalysisData, source: str) -> DiscreteAnalysisData:
    frame = data.frame.copy()
    counts = pd.to_numeric(frame[data.outcome], errors="coerce")
    given = frame[data.outcome].notna()
    with np.errstate(invalid="ignore"):
        bad = given & ~((counts >= 0) & (np.floor(counts) == counts))
    problems = []
    if bad.any():
        problems.append(Problem("data.count_values", "counts must be whole numbers, 0 or more", file=source,
                                field=data.outcome, expected="0, 1, 2, ...",
                                got=", ".join(sorted({repr(v) for v in frame.loc[bad, data.outcome].head(5)})),
                                rows=_rows(frame, bad, data)))
    log_exposure = None
    if endpoint.exposure is not None:
        if endpoint.exposure not in frame.columns:
            problems.append(Problem("data.exposure_column", "the count endpoint's exposure column is missing",
                                    file=source, field=endpoint.exposure, expected="a column of times at risk",
                                    got="no such column"))
        else:
            exposure = pd.to_numeric(frame[endpoint.exposure], errors="coerce")
            not_positive = given & ~(exposure > 0)
            if not_positive.any():
                problems.append(Problem("data.exposure_values", "the time at risk must be positive", file=source,
                                        field=endpoint.exposure, expected="a number > 0",
                                        got=", ".join(sorted({repr(v) for v in frame.loc[not_positive,
                                                                                       endpoint.exposure].head(5)})),
                                        rows=_rows(frame, not_positive, data)))
            else:
                log_exposure = LOG_EXPOSURE
                frame[LOG_EXPOSURE] = np.log(exposure.where(exposure > 0))
    if problems:
        raise DataError(f"{source}: the count endpoint {endpoint.id!r} has values it cannot analyse "
                        f"({problems[0].message})", problems)
    frame[data.outcome] = counts
    return DiscreteAnalysisData(**(_base_fields(data) | {"frame": frame}), endpoint_type="count",
                                exposure=endpoint.exposure, log_exposure=log_exposure)


def _rows(frame: pd.DataFrame, mask: pd.Series, data: AnalysisData) -> tuple[str, ...]:
    chosen = frame.loc[mask, [data.subject, data.visit]].head(10)
    return tuple(f"{data.subject}={s}, {data.visit}={v}" for s, v in chosen.itertuples(index=False))
