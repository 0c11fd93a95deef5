"""The cut-off date of a data cut, and which scheduled visits were due by it.

A data cut is what the database held on its cut-off date.  With each participant's
randomisation (or first-dose) date, a scheduled visit is *due* when

    randomisation date + (planned day − 1) + window  ≤  cut-off

(study day 1 is the randomisation date: the CDISC ADaM study-day convention, which has no
day 0).  A visit with a recorded value is due whatever the calendar says: it happened.  A
visit that is not yet due is neither observed nor missing; it is never imputed.

Without a date column due-ness cannot be judged: every visit counts as due and the report
says so.  A visit without a planned day in the plan is due for the same reason.
"""
from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from trialcut.data.cells import map_distinct
from trialcut.data.readers import RawCut
from trialcut.errors import DataError, Problem

SHOWN_ROWS = 5
ISO_HINT = "write dates as YYYY-MM-DD (ISO 8601), or export the column as a date column"


@dataclass(frozen=True)
class CutOff:
    """The cut-off of one run and what it rests on.

    ``date``: the cut-off (None when neither given nor found); ``source``: ``"given"``,
    ``"latest date in the data"`` or ``"none"``; ``column``: the randomisation-date column
    (None when the plan maps none or the cut lacks it); ``randomisation``: participant ->
    date; ``judged``: whether due-ness can be judged; ``notes``: what a reader should know.
    """

    date: dt.date | None
    source: str
    column: str | None
    first_date: dt.date | None = None
    last_date: dt.date | None = None
    randomisation: dict[Any, dt.date] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    @property
    def judged(self) -> bool:
        return self.date is not None and self.column is not None and bool(self.randomisation)

    def to_dict(self) -> dict[str, Any]:
        return {"date": _iso(self.date), "source": self.source, "date_column": self.column,
                "due_judged": self.judged, "first_date": _iso(self.first_date), "last_date": _iso(self.last_date),
                "participants_with_date": len(self.randomisation), "notes": list(self.notes)}


def _iso(value: dt.date | None) -> str | None:
    return value.isoformat() if value is not None else None


def resolve_cut_off(plan, raw: RawCut, given: dt.date | None = None, today: dt.date | None = None) -> CutOff:
    """The run's cut-off: ``given`` (checked against the data and today) or the latest date in the data.

    Raises DataError (nothing is written) when the date column holds unparseable or
    inconsistent dates, or the cut-off lies before the first record or after today.
    """
    today = today or dt.date.today()
    column = plan.columns.randomisation_date
    if given is not None and given > today:
        raise DataError(f"the cut-off {given.isoformat()} is after today ({today.isoformat()})", [Problem(
            code="data.cut_off_in_future", message="a data cut cannot be cut off on a day that has not come",
            field="--cut-off", expected=f"a date on or before {today.isoformat()}", got=given.isoformat(),
            hint="give the date the database was cut off")])
    if column is None:
        return CutOff(given, "given" if given else "none", None, notes=(
            "The plan maps no randomisation date column (columns.randomisation_date), so whether a "
            "visit was due by the cut-off could not be judged: every scheduled visit counts as due.",))
    if plan.columns.subject not in raw.frame.columns:
        # Without participants there are no dates to read; the conformance checks say what is missing.
        return CutOff(given, "given" if given else "none", None)
    if column not in raw.frame.columns:
        raise DataError(f"the date column {column} is not in {raw.file}", [Problem(
            code="data.missing_date_column", message=f"the plan maps the randomisation date to {column}, "
            "which the data cut lacks", file=str(raw.file), field=column, expected=f"a column {column}",
            got="no such column", hint="add the column to the export, or remove columns.randomisation_date")])
    randomisation = _participant_dates(plan, raw, column)
    first, last = _date_span(plan, raw, randomisation)
    notes = []
    if given is None:
        date, source = last, "latest date in the data"
        notes.append(f"No cut-off was given: the latest date in the data ({_iso(last)}) is used. "
                     "Give --cut-off to state the database cut-off.")
    else:
        date, source = given, "given"
        if first is not None and given < first:
            raise DataError(f"the cut-off {given.isoformat()} is before the first record ({first.isoformat()})", [
                Problem(code="data.cut_off_before_data", message="the cut-off precedes every date in the data cut",
                        file=str(raw.file), field="--cut-off", expected=f"a date on or after {first.isoformat()}",
                        got=given.isoformat(), hint="check the cut-off date and the data file")])
        if last is not None and given < last:
            notes.append(f"The data hold records dated after the cut-off (up to {last.isoformat()}); "
                         "they are analysed as recorded.")
    missing = _participants(plan, raw) - set(randomisation)
    if missing:
        notes.append(f"{len(missing)} participant(s) have no {column}: their visits count as due.")
    return CutOff(date, source, column, first, last, randomisation, tuple(notes))


def _participants(plan, raw: RawCut) -> set[Any]:
    subject = plan.columns.subject
    # Distinct ids first: iterating every record of a text column costs a Python object each.
    return set(pd.unique(raw.frame[subject].dropna()).tolist()) if subject in raw.frame.columns else set()


def parse_dates(values: pd.Series) -> tuple[pd.Series, pd.Series]:
    """(dates as datetime64, True where a filled value is not a date)."""
    if pd.api.types.is_datetime64_any_dtype(values):
        return values.dt.tz_localize(None) if getattr(values.dt, "tz", None) else values, pd.Series(
            False, index=values.index)
    text = map_distinct(values, _as_text)   # a date repeats on every record of a participant
    parsed = pd.to_datetime(text, format="ISO8601", errors="coerce")
    bad = text.notna() & parsed.isna()
    return parsed, bad


def _as_text(value: Any) -> str | None:
    if value is None or value is pd.NA or value is pd.NaT or (isinstance(value, float) and np.isnan(value)):
        return None
    if isinstance(value, (dt.date, pd.Timestamp)):
        return value.isoformat()
    if isinstance(value, (bool, int, float, np.integer, np.floating)):
        # A bare number is no date: it could count days from any origin.
        return f"number {value}"
    return str(value).strip() or None


def _participant_dates(plan, raw: RawCut, column: str) -> dict[Any, dt.date]:
    frame, subject = raw.frame, plan.columns.subject
    parsed, bad = parse_dates(frame[column])
    if bad.any():
        raise DataError(f"column {column} of {raw.file} holds values that are not dates", [Problem(
            code="data.unparseable_date", message=f"{int(bad.sum())} value(s) of {column} are not dates",
            file=str(raw.file), field=column, expected="dates as YYYY-MM-DD", got=repr(str(frame.loc[bad, column].iloc[0])),
            hint=ISO_HINT, rows=_rows(raw, bad, subject, column))])
    dates = pd.DataFrame({"subject": frame[subject], "date": parsed}).dropna()
    counts = dates.groupby("subject")["date"].nunique()
    varying = counts[counts > 1].index
    if len(varying):
        mask = frame[subject].isin(varying) & parsed.notna()
        raise DataError(f"column {column} of {raw.file} changes within a participant", [Problem(
            code="data.date_varies", message=f"{len(varying)} participant(s) have more than one {column}",
            file=str(raw.file), field=column, expected="one date per participant",
            got=", ".join(map(str, list(varying)[:SHOWN_ROWS])), hint="give every record of a participant the same date",
            rows=_rows(raw, mask, subject, column))])
    first = dates.groupby("subject")["date"].first()
    return dict(zip(first.index.tolist(), (value.date() for value in first.tolist())))


def _rows(raw: RawCut, mask: pd.Series, subject: str, column: str) -> tuple[str, ...]:
    """The first offending rows as the conformance checks write them: where (participant): value."""
    positions = np.flatnonzero(mask.to_numpy())[:SHOWN_ROWS]
    who = (lambda p: f" ({raw.frame[subject].iloc[p]})") if subject in raw.frame.columns else (lambda p: "")
    return tuple(f"{raw.row_word} {int(p + raw.first_row)}{who(p)}: {str(raw.frame[column].iloc[p])!r}"
                 for p in positions)


def _date_span(plan, raw: RawCut, randomisation: dict[Any, dt.date]) -> tuple[dt.date | None, dt.date | None]:
    """Earliest randomisation date, and the latest of every randomisation and record date."""
    if not randomisation:
        return None, None
    first = min(randomisation.values())
    last = max(randomisation.values())
    day_column, subject = plan.columns.study_day, plan.columns.subject
    if day_column and day_column in raw.frame.columns:
        days = pd.to_numeric(raw.frame[day_column], errors="coerce")
        start = raw.frame[subject].map(lambda s: randomisation.get(s))
        known = days.notna() & start.notna() & np.isfinite(days)
        if known.any():
            record_dates = _extreme_record_dates(start[known], days[known])
            last = max(last, max(record_dates))
            first = min(first, min(record_dates))
    return first, last


def _extreme_record_dates(start: pd.Series, days: pd.Series) -> list[dt.date]:
    """Dates of records (randomisation date + study day − 1); with whole study days only the
    earliest and the latest, found on day numbers (a date per record cost more than the rest)."""
    values, starts = days.to_numpy(dtype=float), list(start)
    if not (np.all(values == np.round(values)) and np.all(np.abs(values) < 2 ** 52)):
        return _record_dates(starts, values)
    ordinals = np.array([s.toordinal() for s in starts], dtype=np.int64) + values.astype(np.int64)
    extremes = [int(np.argmin(ordinals)), int(np.argmax(ordinals))]
    try:
        return _record_dates([starts[i] for i in extremes], values[extremes])
    except OverflowError:     # a date out of range: fail on the same record, as record by record
        return _record_dates(starts, values)


def _record_dates(starts: list[dt.date], days: np.ndarray) -> list[dt.date]:
    return [start + dt.timedelta(days=float(day) - 1) for start, day in zip(starts, days)]


def due_flags(frame: pd.DataFrame, *, subject: str, visit: str, observed: pd.Series, schedule,
              cut_off: CutOff | None) -> np.ndarray:
    """True for each row (participant × visit) whose visit was due by the cut-off (or observed)."""
    observed = observed.to_numpy(dtype=bool)
    if cut_off is None or not cut_off.judged:
        return np.ones(len(frame), dtype=bool)
    last_day = {v.label: (None if v.day is None else float(v.day) - 1 + float(v.window or 0)) for v in schedule}
    offsets = pd.to_timedelta(frame[visit].map(last_day).astype(float), unit="D")
    starts = pd.to_datetime(frame[subject].map(cut_off.randomisation))
    closes = starts + offsets
    # No date for the participant, or no planned day for the visit: due-ness cannot be judged, so due.
    due = (closes.isna() | (closes <= pd.Timestamp(cut_off.date))).to_numpy(dtype=bool)
    return due | observed
