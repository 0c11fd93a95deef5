"""Each participant's records as text, carried in results.json so two cuts can be compared.

The participant hashes (record.participants.participant_hashes) say *whether* a participant's records
changed between two data cuts; these records say *what* changed: which visit is new, which
value was edited (participant, visit, field, old and new value) and which record went away,
without the data files, which a comparison made later may no longer reach.

A record is named by its visit (and its parameter when the file holds more than one); a
second record with the same name (an unscheduled visit, say) is "Unscheduled (2)", in order of
study day.  The arm column is withheld: a comparison of blinded cuts must not print
treatment codes, so a change of arm shows only through the participant hash.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

FORMAT = 1
# Working columns, named so they cannot meet a column of the file.
SUBJECT, DAY = "\x00subject", "\x00day"


def participant_records(frame: pd.DataFrame, columns: Any) -> dict[str, Any]:
    """{format, fields, withheld, participants: {id: {record name: [text of each field]}}}.

    ``columns`` is the plan's column mapping (subject, arm, visit, study_day, parameter).
    """
    subject, visit = columns.subject, columns.visit
    withheld = [c for c in (columns.arm,) if c in frame.columns]
    fields = [str(c) for c in frame.columns if c != subject and c not in withheld]
    parameter = getattr(columns, "parameter", None)
    several = parameter in frame.columns and frame[parameter].nunique(dropna=True) > 1
    day = getattr(columns, "study_day", None)
    # Column by column, not value by value: a 30,000-participant cut has millions of cells.
    text = pd.DataFrame({field: _texts(frame[field]) for field in fields}, index=frame.index)
    text[SUBJECT] = _texts(frame[subject])
    text[DAY] = pd.to_numeric(frame[day], errors="coerce") if day in frame.columns else 0.0
    sort_keys = [SUBJECT, *([parameter] if several else []), DAY, *([visit] if visit in fields else []), *fields]
    ordered = text.sort_values(sort_keys, kind="stable", na_position="last")
    names = _record_names(ordered, visit if visit in fields else None, parameter if several else None)
    if names is None:    # a name that looks like a numbered repeat: number them one by one
        return _records_one_by_one(ordered, fields, visit, parameter if several else None, withheld)
    participants: dict[str, dict[str, list[str]]] = {}
    for person, name, values in zip(ordered[SUBJECT].tolist(), names, _shared_rows(ordered, fields)):
        participants.setdefault(person, {})[name] = values
    return {"format": FORMAT, "fields": fields, "withheld": withheld,
            "participants": dict(sorted(participants.items()))}


def _record_names(ordered: pd.DataFrame, visit: str | None, parameter: str | None) -> list[str] | None:
    """Each record's name, "<name> (k)" for the k-th record of a name (k >= 2); None when a
    numbered name could meet a name of the data, where only the record-by-record rule is exact."""
    base = ordered[visit].where(ordered[visit] != "", "no visit") if visit else pd.Series("no visit", ordered.index)
    if parameter:
        base = ordered[parameter] + ", " + base
    repeat = base.groupby([ordered[SUBJECT], base], sort=False).cumcount() + 1
    names = base.where(repeat == 1, base + " (" + repeat.astype(str) + ")")
    if names[repeat > 1].isin(set(base)).any():
        return None
    return names.tolist()


def _shared_rows(ordered: pd.DataFrame, fields: list[str]) -> list[list[str]]:
    """The rows' texts as lists, each distinct text one object shared by every cell that holds it:
    a large cut repeats its flags, visits and codes millions of times (about 400 MB held at
    30,000 participants as one object per cell)."""
    columns = []
    for field in fields:
        codes, distinct = pd.factorize(ordered[field])
        if (codes < 0).any():                      # not expected: every text is a string
            return ordered[fields].values.tolist()
        columns.append(np.asarray(distinct, dtype=object)[codes])
    return [list(row) for row in zip(*columns)] if columns else [[] for _ in range(len(ordered))]


def _records_one_by_one(ordered: pd.DataFrame, fields, visit, parameter, withheld) -> dict[str, Any]:
    participants: dict[str, dict[str, list[str]]] = {}
    for values in ordered.to_dict("records"):
        record = participants.setdefault(values[SUBJECT], {})
        name = _record_name(values, visit, parameter)
        repeat, unique = 1, name
        while unique in record:
            repeat += 1
            unique = f"{name} ({repeat})"
        record[unique] = [values[field] for field in fields]
    return {"format": FORMAT, "fields": fields, "withheld": withheld,
            "participants": dict(sorted(participants.items()))}


def _texts(column: pd.Series) -> list[str]:
    """:func:`_text` of every value, with whole columns of numbers converted at once."""
    if pd.api.types.is_float_dtype(column.dtype) and isinstance(column.dtype, np.dtype):
        values = column.to_numpy()
        missing = np.isnan(values) | np.isinf(values)
        whole = ~missing & (np.floor(np.where(missing, 0, values)) == values) & (np.abs(values) < 1e15)
        out = np.full(values.shape, "", dtype=object)
        out[whole] = values[whole].astype(np.int64).astype(str)
        rest = ~missing & ~whole
        out[rest] = [repr(v) for v in values[rest].tolist()]
        out[np.isinf(values)] = [_text(v) for v in values[np.isinf(values)].tolist()]
        return out.tolist()
    if pd.api.types.is_integer_dtype(column.dtype) and isinstance(column.dtype, np.dtype):
        return column.to_numpy().astype(str).tolist()
    if isinstance(column.dtype, pd.StringDtype):     # text, or a gap that reads as empty
        return column.fillna("").to_numpy(dtype=object).tolist()
    return [v if type(v) is str else _text(v) for v in column.to_numpy(dtype=object)]


def _record_name(values: dict[str, Any], visit: str, parameter: str | None) -> str:
    name = values.get(visit) or "no visit"
    return f"{values[parameter]}, {name}" if parameter else name


def _text(value: Any) -> str:
    """A value as a reviewer reads it: empty for missing, 37 for 37.0, the shortest exact form."""
    if value is None:
        return ""
    if isinstance(value, float):
        if math.isnan(value):
            return ""
        return str(int(value)) if value.is_integer() and abs(value) < 1e15 else repr(value)
    try:
        if pd.isna(value):
            return ""
    except (TypeError, ValueError):
        pass
    return str(value)


__all__ = ["participant_records"]
