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
    text = pd.DataFrame({field: [_text(v) for v in frame[field]] for field in fields}, index=frame.index)
    text[SUBJECT] = [str(v) for v in frame[subject]]
    text[DAY] = pd.to_numeric(frame[day], errors="coerce") if day in frame.columns else 0.0
    sort_keys = [SUBJECT, *([parameter] if several else []), DAY, *([visit] if visit in fields else []), *fields]
    participants: dict[str, dict[str, list[str]]] = {}
    for values in text.sort_values(sort_keys, kind="stable", na_position="last").to_dict("records"):
        record = participants.setdefault(values[SUBJECT], {})
        name = _record_name(values, visit, parameter if several else None)
        repeat, unique = 1, name
        while unique in record:
            repeat += 1
            unique = f"{name} ({repeat})"
        record[unique] = [values[field] for field in fields]
    return {"format": FORMAT, "fields": fields, "withheld": withheld,
            "participants": dict(sorted(participants.items()))}


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
