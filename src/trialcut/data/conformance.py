"""Conformance of a data cut to its analysis plan: every check, in one module.

Each check has a stable id, a description, a severity and, after it ran, a status
(``passed``, ``failed`` or ``not_run`` when a column it needs is missing), the number of
offending records or participants and the first offending rows (source row number,
participant, visit).  Every check runs; then :func:`check_cut` raises one ``DataError``
listing every failed check of severity ``error``.  Warnings are kept in the report.

Choices made here (documented because a statistician will ask):
- A participant without a baseline value is a *warning*, not an error: their change from
  baseline cannot be computed, so their outcome is missing and the fit leaves them out.
  Stopping a whole interim for one missing baseline would be worse than reporting it.
- Exact duplicate records are an error (the export doubled something); two different
  records of a participant on the same study day are an error too (windowing chooses
  between days, never within one).
- Typed files (Parquet, Dataset-JSON) must store numeric columns as numbers; CSV is text,
  so numbers are parsed and a value that is not a number is reported with its line.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Callable, Iterable

import numpy as np
import pandas as pd

from trialcut.data.cells import map_distinct, plain_text_dtype
from trialcut.data.readers import RawCut
from trialcut.data.windowing import assign_visits, windows_from_schedule
from trialcut.errors import DataError, Problem

ROW = "__row"          # source row number of each record (CSV line, or record number)
ROLE = "__role"        # "baseline", "post", or "other" (a baseline-labelled record not flagged)
ANALYSIS_VISIT = "__analysis_visit"
CHOSEN = "__chosen"    # the one record analysed per participant and visit
MISSING_TEXT = {"", ".", "NA", "NaN", "nan"}
# The analyses square values and multiply covariance matrices; beyond this size that
# arithmetic overflows a double (about 1.8e308).  No measured score comes near it.
LARGEST_VALUE = 1e60
# A filled change may differ from value minus baseline by rounding in the export only:
# this relative tolerance (of the larger of 1, |value| and |baseline|) allows for a
# decimal written with 6 significant digits, and nothing more.
CHANGE_TOLERANCE = 1e-6
FLAG_VALUES = {"Y", "N"}
SHOWN_ROWS = 10


@dataclass(frozen=True)
class Check:
    id: str
    description: str
    severity: str                     # "error" stops the run, "warning" is recorded
    status: str = "passed"            # "passed", "failed", "not_run"
    count: int = 0
    rows: tuple[dict[str, Any], ...] = ()
    field: str | None = None
    hint: str | None = None
    unit: str = "records"             # what ``count`` counts: records, participants, columns, visits
    got: str | None = None            # what was found, when a count alone would mislead

    @property
    def failed(self) -> bool:
        return self.status == "failed"

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["rows"] = [dict(r) for r in self.rows]
        return data


@dataclass(frozen=True)
class ConformanceReport:
    file: str
    checks: tuple[Check, ...]

    @property
    def errors(self) -> tuple[Check, ...]:
        return tuple(c for c in self.checks if c.failed and c.severity == "error")

    @property
    def warnings(self) -> tuple[Check, ...]:
        return tuple(c for c in self.checks if c.failed and c.severity == "warning")

    def to_frame(self) -> pd.DataFrame:
        columns = ["id", "description", "severity", "status", "count", "field", "rows"]
        records = [{**c.to_dict(), "rows": "; ".join(_row_text(r) for r in c.rows)} for c in self.checks]
        return pd.DataFrame(records, columns=columns)

    def to_dict(self) -> dict[str, Any]:
        return {"file": self.file, "checks": [c.to_dict() for c in self.checks]}

    def problems(self, severity: str = "error") -> list[Problem]:
        failed = self.errors if severity == "error" else self.warnings
        return [Problem(code=f"data.{c.id}", message=c.description, file=self.file, field=c.field,
                        got=c.got or f"{c.count} {_unit(c)}", hint=c.hint,
                        rows=tuple(_row_text(r) for r in c.rows)) for c in failed]


@dataclass(frozen=True)
class CheckedCut:
    """The typed records after every check, with role, analysis visit and the choice made."""

    records: pd.DataFrame
    report: ConformanceReport
    derivations: tuple[dict[str, Any], ...]


def _unit(check: Check) -> str:
    return check.unit[:-1] if check.count == 1 and check.unit.endswith("s") else check.unit


def _row_text(row: dict[str, Any]) -> str:
    who = ", ".join(str(row[k]) for k in ("subject", "visit") if row.get(k) is not None)
    extra = f": {row['value']!r}" if "value" in row else ""
    return f"{row['where']}" + (f" ({who})" if who else "") + extra


# --------------------------------------------------------------------------- entry point
def check_cut(plan, raw: RawCut) -> CheckedCut:
    """Run every check of ``raw`` against ``plan``; raise DataError if any error-severity check fails."""
    state = _State(plan, raw)
    for step in _STEPS:
        step(state)
    report = ConformanceReport(raw.file, tuple(state.checks))
    if report.errors:
        names = ", ".join(c.id for c in report.errors)
        raise DataError(f"the data cut {raw.file} does not conform to the plan ({names})", report.problems())
    return CheckedCut(state.work, report, tuple(state.log))


class _State:
    """What the checks share while they run (built once per cut, private)."""

    def __init__(self, plan, raw: RawCut):
        self.plan = plan
        self.raw = raw
        self.columns = plan.columns
        self.work = raw.frame.copy()
        self.work.columns = [str(c) for c in self.work.columns]
        for name in self.work.columns:
            # Categorical columns (Parquet dictionaries) are compared and grouped as plain values.
            if isinstance(self.work[name].dtype, pd.CategoricalDtype):
                self.work[name] = self.work[name].astype(object)
        self.work[ROW] = np.arange(len(self.work)) + raw.first_row
        self.checks: list[Check] = []
        self.log: list[dict[str, Any]] = []
        self.missing: set[str] = set()

    # -- helpers used by the checks
    def has(self, *names: str | None) -> bool:
        return all(n is not None and n in self.work.columns and n not in self.missing for n in names)

    def offending(self, mask: pd.Series, value_column: str | None = None) -> tuple[dict[str, Any], ...]:
        picked = self.work[mask.reindex(self.work.index, fill_value=False)].sort_values(ROW).head(SHOWN_ROWS)
        return tuple(self._describe(record, value_column) for _, record in picked.iterrows())

    def _describe(self, record: pd.Series, value_column: str | None) -> dict[str, Any]:
        row = {"row": int(record[ROW]), "where": f"{self.raw.row_word} {int(record[ROW])}",
               "subject": _text_or_none(record.get(self.columns.subject)),
               "visit": _text_or_none(record.get(self.columns.visit))}
        if value_column is not None:
            row["value"] = _value_text(record.get(value_column))
        return row

    def record(self, check_id: str, description: str, severity: str, mask: pd.Series | None = None,
               *, count: int | None = None, field: str | None = None, hint: str | None = None,
               value_column: str | None = None, rows: tuple[dict[str, Any], ...] | None = None,
               unit: str = "records", got: str | None = None) -> None:
        if mask is None and count is None:
            self.checks.append(Check(check_id, description, severity, "not_run", 0, (), field, hint, unit))
            return
        found = int(mask.sum()) if count is None else count
        shown = rows if rows is not None else (self.offending(mask, value_column) if found else ())
        status = "failed" if found else "passed"
        self.checks.append(Check(check_id, description, severity, status, found, shown, field, hint, unit,
                                 got if found else None))


def _value_text(value: Any) -> str | None:
    """A cell as the user wrote it: 98 rather than 98.0, text unchanged."""
    if isinstance(value, (float, np.floating)) and np.isfinite(value) and float(value).is_integer() \
            and abs(value) < 1e15:
        return str(int(value))
    return _text_or_none(value)


def _text_or_none(value: Any) -> str | None:
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return None
    return str(value)


# --------------------------------------------------------------------------- required columns
def required_columns(plan) -> dict[str, str]:
    """Column name -> why the plan needs it."""
    cols = plan.columns
    needed = {cols.subject: "participant identifier", cols.arm: "treatment arm",
              cols.visit: "visit label", cols.value: "measured value"}
    if plan.visits.windowing and cols.study_day:
        needed[cols.study_day] = "study day (the plan assigns visits by windows)"
    if not plan.visits.windowing and cols.analysis_flag:
        needed[cols.analysis_flag] = "analysis flag (the plan keeps the data's own visit assignment)"
    if cols.parameter and any(e.parameter for e in plan.endpoints):
        needed[cols.parameter] = "parameter code (the plan selects endpoints by it)"
    for population in plan.populations:
        if population.flag:
            needed[population.flag] = f"flag of population {population.id}"
    for event in plan.intercurrent_events:
        needed[event.day_column] = f"day of intercurrent event {event.id}"
    for stratum in plan.arms.strata:
        needed[stratum] = "randomisation stratum"
    derivable = {c for c in (cols.baseline, cols.change) if c}
    for name, why in _analysis_columns(plan):
        if name not in derivable:
            needed.setdefault(name, why)
    return needed


def _analysis_columns(plan) -> Iterable[tuple[str, str]]:
    for endpoint in plan.endpoints:
        for analysis in endpoint.analyses.every:
            options = analysis.options
            for name in getattr(options, "covariates", ()) + getattr(options, "covariates_by_visit", ()):
                yield name, f"covariate of analysis {analysis.id}"
            if getattr(options, "covariance_by", None):
                yield options.covariance_by, f"covariance grouping of analysis {analysis.id}"


def _check_required(state: _State) -> None:
    needed = required_columns(state.plan)
    absent = [name for name in needed if name not in state.work.columns]
    state.missing.update(absent)
    description = "columns the plan needs that are missing"
    if absent:
        description = "columns the plan needs that are missing: " + ", ".join(
            f"{n} ({needed[n]})" for n in absent)
    present = [c for c in state.work.columns if c != ROW]
    shown = ", ".join(present[:12]) + (f", … ({len(present) - 12} more)" if len(present) > 12 else "")
    state.record("required_columns", description, "error", count=len(absent), unit="columns",
                 field=", ".join(absent) or None,
                 hint="add the columns to the export, or map them in the plan's 'columns' section",
                 rows=(), got=f"{len(absent)} of {len(needed)} needed columns missing from a file with "
                              f"{len(present)} column{'s' if len(present) != 1 else ''}: {shown}")


# --------------------------------------------------------------------------- types
def numeric_columns(plan) -> list[str]:
    cols = plan.columns
    names = [cols.value, cols.baseline, cols.change, cols.study_day, cols.visit_number]
    names += [e.day_column for e in plan.intercurrent_events]
    return list(dict.fromkeys(n for n in names if n))


def text_columns(plan) -> list[str]:
    cols = plan.columns
    names = [cols.subject, cols.arm, cols.visit, cols.baseline_flag, cols.parameter, cols.analysis_flag]
    names += [p.flag for p in plan.populations if p.flag] + list(plan.arms.strata)
    return list(dict.fromkeys(n for n in names if n))


def _check_types(state: _State) -> None:
    bad_total = pd.Series(False, index=state.work.index)
    offenders: list[str] = []
    first_column = None
    for name in numeric_columns(state.plan):
        if not state.has(name):
            continue
        numbers, bad = _to_numbers(state.work[name], state.raw.typed)
        if bad.any():
            offenders.append(name)
            first_column = first_column or name
            bad_total |= bad
            state.record(f"numeric_{name}", f"column {name} holds values that are not numbers", "error", bad,
                         field=name, value_column=name,
                         hint=f"correct the values or export {name} as a numeric column")
            state.missing.add(name)
        else:
            state.work[name] = numbers
    if not offenders:
        state.record("numeric_columns", "numeric columns holding values that are not numbers", "error", bad_total)
    for name in text_columns(state.plan):
        if state.has(name):
            state.work[name] = map_distinct(state.work[name], _clean_text)
    if not state.raw.typed:
        _parse_other_numbers(state)


def _to_numbers(values: pd.Series, typed: bool) -> tuple[pd.Series, pd.Series]:
    if typed:
        if pd.api.types.is_bool_dtype(values):
            return values, values.notna()
        if pd.api.types.is_numeric_dtype(values):
            return values.astype(float), pd.Series(False, index=values.index)
        # A typed file's text column is wrong for a number, even if its text would parse.
        is_number = values.map(_is_number_or_missing).astype(bool)
        # As objects first: a date or time column would put NaT, which float() refuses, in the gaps.
        numbers = values.astype(object).where(is_number, None).map(_float_or_nan).astype(float)
        return numbers, ~is_number
    text = map_distinct(values, _stripped)     # once per distinct text: a large cut repeats its values
    blank = text.isna() | text.isin(MISSING_TEXT)
    numbers = pd.to_numeric(text.where(~blank), errors="coerce").astype(float)
    return numbers, numbers.isna() & ~blank


def _stripped(value: Any) -> str | None:
    return None if value is None or (isinstance(value, float) and np.isnan(value)) else str(value).strip()


def _is_number_or_missing(value: Any) -> bool:
    if value is None or value is pd.NA:
        return True
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _float_or_nan(value: Any) -> float:
    return np.nan if value is None or value is pd.NA else float(value)


def _clean_text(value: Any) -> Any:
    if value is None or value is pd.NA or (isinstance(value, float) and np.isnan(value)):
        return None
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        value = int(value)          # a numeric code written as 3.0 means "3"
    text = str(value).strip()
    return text if text else None


def _parse_other_numbers(state: _State) -> None:
    """CSV columns outside the plan's roles (AGE, covariates) become numbers when all of them parse."""
    skip = set(numeric_columns(state.plan)) | set(text_columns(state.plan)) | {ROW}
    for name in state.work.columns:
        if name in skip:
            continue
        numbers, bad = _to_numbers(state.work[name], typed=False)
        if not bad.any() and numbers.notna().any():
            state.work[name] = numbers


# --------------------------------------------------------------------------- identifiers, arms
def _check_identifiers(state: _State) -> None:
    cols = state.columns
    if not state.has(cols.subject, cols.arm):
        state.record("identifiers_present", "records without a participant or an arm", "error")
        return
    mask = state.work[cols.subject].isna() | state.work[cols.arm].isna()
    state.record("identifiers_present", "records without a participant or an arm", "error", mask,
                 field=f"{cols.subject}, {cols.arm}", hint="every record needs a participant id and an arm")


def _check_parameters(state: _State) -> None:
    """Keep only the records of the plan's endpoint parameters; others are logged, not checked."""
    cols = state.columns
    wanted = {e.parameter for e in state.plan.endpoints if e.parameter}
    if not wanted or not state.has(cols.parameter):
        return
    keep = state.work[cols.parameter].isin(wanted)
    dropped = int((~keep).sum())
    if dropped:
        state.log.append({"step": "parameter_selection", "count": dropped,
                          "reason": f"records of parameters other than {sorted(wanted)} are not analysed"})
    state.work = state.work[keep].copy()
    if state.work.empty:
        state.record("endpoint_records", f"no records for the plan's parameters {sorted(wanted)}", "error",
                     count=1, field=cols.parameter, rows=(),
                     hint=f"check the values of {cols.parameter} against the endpoints' 'parameter'")


def _check_arms(state: _State) -> None:
    arm = state.columns.arm
    if not state.has(arm):
        state.record("known_arms", "arms not in the plan", "error")
        return
    known = set(state.plan.arm_codes)
    values = state.work[arm]
    mask = values.notna() & ~values.isin(known)
    unknown = sorted(set(values[mask]))
    description = "arms not in the plan"
    if unknown:
        description = f"arms not in the plan: {', '.join(map(repr, unknown))}"
    state.record("known_arms", description, "error", mask, field=arm, value_column=arm,
                 hint=f"the plan's arms are {', '.join(state.plan.arm_codes)}")


def _varies_within_participant(state: _State, column: str) -> pd.Series:
    subject = state.columns.subject
    fast = _varies_on_codes(state.work[subject], state.work[column])
    if fast is not None:
        return fast
    counts = state.work.groupby(subject, dropna=True)[column].nunique(dropna=False)
    varying = counts[counts > 1].index
    return state.work[subject].isin(varying)


def _varies_on_codes(subjects: pd.Series, values: pd.Series) -> pd.Series | None:
    """:func:`_varies_within_participant` on integer codes (a groupby per column cost more than the
    check); None when ids have gaps or text values have gaps (the general route decides those)."""
    dtype = values.dtype
    numbers = isinstance(dtype, np.dtype) and dtype.kind in "fiub"
    if not len(values) or not (numbers or plain_text_dtype(dtype)) or (dtype == object and values.isna().any()):
        return None
    people = pd.factorize(subjects)[0]
    if (people < 0).any():
        return None
    codes = pd.factorize(values, use_na_sentinel=False)[0].astype(np.int64)   # a gap is one value, as nunique counts it
    width = int(codes.max()) + 1
    pairs = np.unique(people.astype(np.int64) * width + codes)
    distinct = np.bincount(pairs // width, minlength=int(people.max()) + 1)
    return pd.Series(distinct[people] > 1, index=subjects.index, name=subjects.name)


def _check_arm_constant(state: _State) -> None:
    arm = state.columns.arm
    if not state.has(state.columns.subject, arm):
        state.record("arm_constant", "the arm changes within a participant", "error")
        return
    mask = _varies_within_participant(state, arm)
    state.record("arm_constant", "the arm changes within a participant", "error", mask, field=arm,
                 value_column=arm, hint="a participant has one randomised arm; correct the records")


def subject_level_columns(plan) -> list[str]:
    names = [p.flag for p in plan.populations if p.flag] + list(plan.arms.strata)
    names += [e.day_column for e in plan.intercurrent_events]
    return list(dict.fromkeys(names))


def _check_subject_level(state: _State) -> None:
    names = [n for n in subject_level_columns(state.plan) if state.has(n)]
    if not state.has(state.columns.subject):
        state.record("participant_constant", "participant-level columns varying within a participant", "error")
        return
    mask = pd.Series(False, index=state.work.index)
    varying = []
    for name in names:
        column_mask = _varies_within_participant(state, name)
        if column_mask.any():
            varying.append(name)
        mask |= column_mask
    description = "participant-level columns varying within a participant"
    if varying:
        description = f"participant-level columns vary within a participant: {', '.join(varying)}"
    state.record("participant_constant", description, "error", mask, field=", ".join(varying) or None,
                 hint="flags, strata and event days describe the participant: give every record the same value")


def _check_flags(state: _State) -> None:
    flags = [p.flag for p in state.plan.populations if p.flag and state.has(p.flag)]
    mask = pd.Series(False, index=state.work.index)
    bad_columns = []
    for flag in flags:
        column_mask = state.work[flag].notna() & ~state.work[flag].isin(FLAG_VALUES)
        if column_mask.any():
            bad_columns.append(flag)
        mask |= column_mask
    state.record("population_flags", "population flags other than Y, N or blank", "error", mask,
                 field=", ".join(bad_columns) or None, value_column=bad_columns[0] if bad_columns else None,
                 hint="write population flags as Y or N")


def _check_baseline_flag(state: _State) -> None:
    flag = state.columns.baseline_flag
    if not state.has(flag):
        return
    mask = state.work[flag].notna() & (state.work[flag] != "Y")
    state.record("baseline_flag_values", f"baseline flags ({flag}) other than Y or blank", "error", mask,
                 field=flag, value_column=flag, hint=f"mark the baseline record with Y and leave {flag} empty elsewhere")


# --------------------------------------------------------------------------- values
def _floats(state: _State, name: str) -> np.ndarray:
    """A numeric column as a plain array: the value checks below work on arrays, not Series
    (pandas' per-operation cost was most of their time on a cut of a few thousand records)."""
    return state.work[name].astype(float).to_numpy()


def _check_finite(state: _State) -> None:
    mask = np.zeros(len(state.work), dtype=bool)
    bad_columns = []
    for name in numeric_columns(state.plan):
        if state.has(name):
            column_mask = np.isinf(_floats(state, name))
            if column_mask.any():
                bad_columns.append(name)
            mask |= column_mask
    mask = pd.Series(mask, index=state.work.index)
    state.record("finite_values", "numeric values that are infinite", "error", mask,
                 field=", ".join(bad_columns) or None, value_column=bad_columns[0] if bad_columns else None,
                 hint="replace infinite values by the measured value or leave them empty")
    _check_magnitude(state)


def _check_magnitude(state: _State) -> None:
    mask = np.zeros(len(state.work), dtype=bool)
    bad_columns = []
    for name in numeric_columns(state.plan):
        if state.has(name):
            values = _floats(state, name)
            column_mask = np.isfinite(values) & (np.abs(values) > LARGEST_VALUE)
            if column_mask.any():
                bad_columns.append(name)
            mask |= column_mask
    mask = pd.Series(mask, index=state.work.index)
    state.record("value_magnitude", f"numeric values beyond ±{LARGEST_VALUE:g}, too large for the analyses' "
                 "arithmetic", "error", mask, field=", ".join(bad_columns) or None,
                 value_column=bad_columns[0] if bad_columns else None,
                 hint="correct the values (a unit or export error?) and declare the endpoint's range in the plan")


def _endpoint_rows(state: _State, endpoint) -> pd.Series:
    cols = state.columns
    if endpoint.parameter and state.has(cols.parameter):
        return state.work[cols.parameter] == endpoint.parameter
    return pd.Series(True, index=state.work.index)


def _check_range(state: _State) -> None:
    cols = state.columns
    mask = np.zeros(len(state.work), dtype=bool)
    bad_columns: list[str] = []
    ranged = [e for e in state.plan.endpoints if e.range is not None]
    for endpoint in ranged:
        low, high = endpoint.range
        rows = _endpoint_rows(state, endpoint).to_numpy(dtype=bool, na_value=False)
        limits = [(cols.value, low, high), (cols.baseline, low, high), (cols.change, low - high, high - low)]
        for name, lower, upper in limits:
            if name and state.has(name):
                values = _floats(state, name)
                with np.errstate(invalid="ignore"):
                    column_mask = rows & np.isfinite(values) & ((values < lower) | (values > upper))
                if column_mask.any():
                    bad_columns.append(name)
                mask |= column_mask
    mask = pd.Series(mask, index=state.work.index)
    hint = "; ".join(f"{e.id}: {e.range[0]:g} to {e.range[1]:g}" for e in ranged)
    state.record("value_range", "values outside the endpoint's declared range", "error", mask,
                 field=", ".join(dict.fromkeys(bad_columns)) or None,
                 value_column=bad_columns[0] if bad_columns else None,
                 hint=f"declared ranges: {hint}; correct the values or the plan" if ranged else None)


def _check_change(state: _State) -> None:
    """A filled change must equal value − baseline (the ADaM definition of CHG) within the
    rounding of an export; a shifted or stale change column would otherwise be analysed as is."""
    cols = state.columns
    if not (cols.change and state.has(cols.change, cols.value, cols.baseline)):
        return
    change, value, baseline = (state.work[c].astype(float) for c in (cols.change, cols.value, cols.baseline))
    scale = np.maximum(1.0, np.maximum(value.abs(), baseline.abs()))
    filled = change.notna() & value.notna() & baseline.notna()
    mask = filled & ((change - (value - baseline)).abs() > CHANGE_TOLERANCE * scale)
    state.record("change_consistent", f"{cols.change} differs from {cols.value} − {cols.baseline}", "error", mask,
                 field=cols.change, value_column=cols.change,
                 hint=f"correct {cols.change}, or leave it empty and trialcut derives it as {cols.value} − "
                      f"{cols.baseline} (tolerance: {CHANGE_TOLERANCE:g} × the larger of 1, |{cols.value}| "
                      f"and |{cols.baseline}|)")


def _check_exact_duplicates(state: _State) -> None:
    data_columns = [c for c in state.work.columns if not c.startswith("__")]
    try:
        mask = state.work.duplicated(subset=data_columns, keep="first")
    except TypeError:      # unhashable cells (lists from a typed file): compare as text
        mask = state.work[data_columns].astype(str).duplicated(keep="first")
    state.record("exact_duplicates", "records repeated exactly (the later copies are shown)", "error", mask,
                 hint="remove the repeated records from the export")
    state.work = state.work[~mask].copy()


# --------------------------------------------------------------------------- visits
def _group_columns(state: _State) -> list[str]:
    cols = state.columns
    keys = [cols.subject]
    if state.has(cols.parameter):
        keys.append(cols.parameter)
    return keys


def _assign_roles(state: _State) -> None:
    cols = state.columns
    label = state.plan.visits.baseline
    visits = state.work[cols.visit] if state.has(cols.visit) else pd.Series(None, index=state.work.index)
    if state.has(cols.baseline_flag):
        baseline = state.work[cols.baseline_flag] == "Y"
    else:
        baseline = visits == label
    labelled_baseline = (visits == label) & ~baseline
    state.work[ROLE] = np.where(baseline, "baseline", np.where(labelled_baseline, "other", "post"))
    state.work[ANALYSIS_VISIT] = None
    state.work[CHOSEN] = False


def _check_one_baseline(state: _State) -> None:
    if not state.has(state.columns.subject):
        state.record("one_baseline", "participants with more than one baseline record", "error")
        return
    baseline = state.work[state.work[ROLE] == "baseline"]
    mask = baseline.duplicated(subset=_group_columns(state), keep=False).reindex(state.work.index, fill_value=False)
    state.record("one_baseline", "participants with more than one baseline record", "error", mask,
                 field=state.columns.baseline_flag, hint="flag exactly one record per participant as baseline")


def _check_visits(state: _State) -> None:
    if state.plan.visits.windowing:
        _check_same_day(state)
        _window(state)
    else:
        _check_known_visits(state)
        _check_one_per_visit(state)


def _check_known_visits(state: _State) -> None:
    visit = state.columns.visit
    if not state.has(visit):
        state.record("known_visits", "visit labels not in the plan", "error")
        return
    post = (state.work[ROLE] == "post") & _flagged_for_analysis(state)
    mask = post & ~state.work[visit].isin(state.plan.visit_labels)
    unknown = sorted(set(state.work.loc[mask, visit].dropna().astype(str)))
    description = "visit labels not in the plan"
    if mask.any():
        description = "visit labels not in the plan: " + (", ".join(map(repr, unknown)) or "(blank)")
    # The plan may trust the data's own assignment and leave records at other labels out (counted).
    severity = "warning" if state.plan.visits.other_labels == "leave_out" else "error"
    state.record("known_visits", description, severity, mask, field=visit, value_column=visit,
                 hint=f"the plan's visits are {state.plan.visits.baseline}, {', '.join(state.plan.visit_labels)}"
                      " (or turn on windowing by study day)")
    assigned = ~mask & post
    state.work.loc[assigned, ANALYSIS_VISIT] = state.work.loc[assigned, visit]


def _flagged_for_analysis(state: _State) -> pd.Series:
    """Records the data's own analysis flag keeps (every record when the plan maps no flag)."""
    flag = state.columns.analysis_flag
    if not flag or state.plan.visits.windowing or not state.has(flag):
        return pd.Series(True, index=state.work.index)
    kept = state.work[flag] == "Y"
    left_out = int(((state.work[ROLE] == "post") & ~kept).sum())
    if left_out:
        state.log.append({"step": "analysis_flag", "count": left_out,
                          "reason": f"post-baseline records without {flag} = Y are not analysed (the data's own choice)"})
    return kept


def _check_one_per_visit(state: _State) -> None:
    if not state.has(state.columns.subject, state.columns.visit):
        state.record("one_record_per_visit", "participants with more than one record at the same visit", "error")
        return
    post = state.work[ANALYSIS_VISIT].notna()
    keys = _group_columns(state) + [ANALYSIS_VISIT]
    mask = (state.work[post].duplicated(subset=keys, keep=False)).reindex(state.work.index, fill_value=False)
    state.record("one_record_per_visit", "participants with more than one record at the same visit", "error",
                 mask, field=state.columns.visit,
                 hint="keep one record per participant and visit, or give the records study days and turn on windowing")
    state.work[CHOSEN] = post & ~mask


def _check_same_day(state: _State) -> None:
    day = state.columns.study_day
    if not state.has(state.columns.subject, day):
        state.record("same_day_records", "participants with two different records on the same study day", "error")
        return
    post = (state.work[ROLE] == "post") & state.work[day].notna()
    keys = _group_columns(state) + [day]
    mask = state.work[post].duplicated(subset=keys, keep=False).reindex(state.work.index, fill_value=False)
    state.record("same_day_records", "participants with two different records on the same study day", "error",
                 mask, field=day, value_column=day,
                 hint="windowing chooses between days, not within one: keep one record per day")


def _window(state: _State) -> None:
    cols = state.columns
    if not state.has(cols.subject, cols.study_day) or any(c.failed for c in state.checks if c.id == "same_day_records"):
        state.record("visit_windows", "post-baseline records outside every visit window (not analysed)", "warning")
        return
    post = state.work[state.work[ROLE] == "post"]
    parameters = post[cols.parameter] if state.has(cols.parameter) else None
    result = assign_visits(post[cols.study_day].astype(float), post[cols.subject],
                           windows_from_schedule(state.plan.visits.schedule), parameters)
    state.work.loc[post.index, ANALYSIS_VISIT] = result.visit
    state.work.loc[post.index, CHOSEN] = result.chosen
    state.log.extend(result.log)
    unassigned = pd.Series(False, index=state.work.index)
    unassigned.loc[post.index] = result.visit.isna()
    state.record("visit_windows", "post-baseline records outside every visit window (not analysed)", "warning",
                 unassigned, field=cols.study_day, value_column=cols.study_day,
                 hint="see the derivation log; widen the windows in the plan if these records belong to a visit")


# --------------------------------------------------------------------------- per participant
def _check_baseline_present(state: _State) -> None:
    cols = state.columns
    if not state.has(cols.subject):
        state.record("baseline_present", "participants without a baseline value (their change cannot be computed)", "warning")
        return
    base_record = (state.work[ROLE] == "baseline")
    if state.has(cols.value):
        base_record &= state.work[cols.value].notna()
    if state.has(cols.baseline):
        base_record |= state.work[cols.baseline].notna()
    first_each = _first_record_of_participants_without(state, base_record)
    state.record("baseline_present", "participants without a baseline value (their change cannot be computed)",
                 "warning", first_each, field=cols.baseline or cols.value, unit="participants",
                 hint="their outcomes are left missing; check the baseline records in the export")


def _check_post_baseline(state: _State) -> None:
    cols = state.columns
    if not state.has(cols.subject):
        state.record("post_baseline_present", "participants without post-baseline data at any analysis visit", "warning")
        return
    analysed = state.work[CHOSEN].astype(bool)
    if state.has(cols.value):
        analysed &= state.work[cols.value].notna()
    first_each = _first_record_of_participants_without(state, analysed)
    state.record("post_baseline_present", "participants without post-baseline data at any analysis visit",
                 "warning", first_each, unit="participants", hint="they add nothing to a repeated-measures fit; check whether data are expected")
    if len(state.work) and not analysed.any() and not any(c.failed and c.severity == "error" for c in state.checks):
        # Nothing to analyse at all (e.g. every study day negative), and no error above explains it.
        post = state.work[ROLE] == "post"
        state.record("analysable_records", "no record of any participant falls at an analysis visit", "error",
                     count=1, rows=state.offending(post, cols.study_day if state.has(cols.study_day) else cols.visit),
                     got=f"none of {int(post.sum())} post-baseline records",
                     field=cols.study_day if state.plan.visits.windowing else cols.visit,
                     hint="check the study days (relative to randomisation, day 1 the first day) and the "
                          "visit windows or labels in the plan")


def _first_record_of_participants_without(state: _State, having: pd.Series) -> pd.Series:
    """True on the first record of each participant (and parameter) none of whose records is ``having``."""
    keys = _group_columns(state)
    codes = [pd.factorize(state.work[k].to_numpy(dtype=object))[0] for k in keys]
    if len(state.work) and all((code >= 0).all() for code in codes):
        # On integer codes: a groupby per check cost more than the check (ids with gaps go the general way).
        group = pd.factorize(pd.MultiIndex.from_arrays(codes) if len(codes) > 1 else codes[0])[0]
        counts = np.bincount(group, weights=having.to_numpy(dtype=bool, na_value=False), minlength=group.max() + 1)
        first = np.zeros(len(group), dtype=bool)
        first[np.unique(group, return_index=True)[1]] = True
        return pd.Series((counts[group] == 0) & first, index=state.work.index)
    has_any = having.groupby([state.work[k] for k in keys], dropna=False).transform("any")
    return ~has_any.astype(bool) & ~state.work.duplicated(subset=keys)


def _check_event_timing(state: _State) -> None:
    """Events are placed in time by study days: without a study day column, every visit needs a planned day."""
    events = [e for e in state.plan.intercurrent_events if state.has(e.day_column)]
    undated = [v.label for v in state.plan.visits.schedule if v.day is None]
    if not events:
        return
    cannot = bool(undated) and not state.has(state.columns.study_day)
    state.record("event_timing", "visits that cannot be placed before or after intercurrent events"
                 + (f": {', '.join(undated)}" if cannot else ""), "warning",
                 count=len(undated) if cannot else 0, rows=(), field=state.columns.study_day, unit="visits",
                 hint="give the visits a planned 'day' in the plan or add the study day column; "
                      "until then events never affect these visits")


_STEPS: tuple[Callable[[_State], None], ...] = (
    _check_required, _check_types, _check_identifiers, _check_parameters, _check_arms, _check_arm_constant,
    _check_subject_level, _check_flags, _check_baseline_flag, _check_finite, _check_range, _check_change,
    _check_exact_duplicates,
    _assign_roles, _check_one_baseline, _check_visits, _check_baseline_present, _check_post_baseline,
    _check_event_timing,
)
