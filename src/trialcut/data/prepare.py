"""From a checked data cut to the analysis data of one endpoint, estimand and population.

:func:`prepare_cut` runs the conformance checks, derives what the export may lack (baseline
value, change from baseline, analysis visit), optionally replaces the arms by dummy arms
for a blinded dry run, and returns a frozen :class:`DataCut`.  ``DataCut.analysis_data``
then applies the population and the estimand's intercurrent-event strategies.

Choices (documented because the report states them):
- ``records`` keeps the baseline record and the one analysed record per participant and
  visit; the visit column holds the *analysis* visit, the label as collected is kept in
  ``visit_collected`` and the source row number in ``source_row``.
- The change from baseline is taken from the change column where it is filled, else
  derived as value − baseline; the baseline is the baseline column where filled, else the
  value of the participant's baseline record.
- An intercurrent event affects a visit when its day is on or before the visit's study
  day (the record's own day; the planned day when the visit is missing).  When several
  events affect a visit, the earliest event whose strategy changes the outcome
  (hypothetical or composite) governs it; if none does, the earliest event is reported.
  ``intercurrent_event`` and ``strategy`` name the governing event.
- Composite strategy: the *analysed* variable (the change when the endpoint is analysed
  as change) is set to the plan's ``composite_value``; ``outcome_set_composite`` flags it.
- The arm column of ``AnalysisData.frame`` holds plain strings; ``AnalysisData.arms``
  gives the plan's order.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field, replace
import datetime as dt
from typing import Any

import numpy as np
import pandas as pd

from trialcut.data.conformance import (ANALYSIS_VISIT, CHOSEN, ROLE, ROW, ConformanceReport, check_cut,
                                       subject_level_columns)
from trialcut.data.cutoff import CutOff, due_flags, resolve_cut_off
from trialcut.data.dummy_arms import ArmBlinding, allocate, blind_raw, blinding_for
from trialcut.data.readers import RawCut
from trialcut.errors import DataError, PlanError, Problem

SOURCE_ROW = "source_row"
VISIT_COLLECTED = "visit_collected"
ROLE_COLUMN = "record_role"          # "baseline" or "post" in DataCut.records
DEFAULT_REASON_COLUMN = "DCSREAS"
DUE = "due"                          # AnalysisData.frame: the visit was due by the cut-off
OBSERVED = "outcome_observed"        # AnalysisData.frame: a value was recorded (before any strategy)


@dataclass(frozen=True)
class AnalysisData:
    """What an analysis method receives: one row per participant × scheduled visit."""

    frame: pd.DataFrame
    subject: str
    arm: str
    visit: str
    outcome: str
    baseline: str
    visits: tuple[str, ...]
    visit_days: dict[str, float | None]
    arms: tuple[str, ...]
    reference: str
    primary_visit: str
    population: str | None
    estimand: str | None
    endpoint: str = ""
    due_judged: bool = False

    @property
    def n_subjects(self) -> int:
        return int(self.frame[self.subject].nunique())

    def due_only(self) -> "AnalysisData":
        """The rows whose visit was due by the cut-off: what every analysis method receives.

        A visit not yet due is no missing value: it is left out, never imputed.  A method that
        rebuilds a participants × visits grid must not fill in the cells left out here.
        """
        return replace(self, frame=self.frame[self.frame[DUE]].reset_index(drop=True))

    def participants_due(self, visit: str | None = None) -> int:
        """Participants whose ``visit`` (default: the primary visit) was due by the cut-off.

        The information reached at an interim is this count over the planned total.
        """
        visit = visit or self.primary_visit
        rows = self.frame[(self.frame[self.visit] == visit) & self.frame[DUE]]
        return int(rows[self.subject].nunique())


@dataclass(frozen=True)
class DataCut:
    """A checked, derived data cut: everything the runner needs, nothing mutable on purpose.

    ``records``: the baseline record and the analysed record per participant and visit
    (see the module notes); ``subjects``: one row per participant (arm, strata, population
    flags, event days, the reason for leaving the study when the cut has one, and every
    other column constant within participants); ``conformance``: every check;
    ``derivations``: every choice made (windows, derived values, dummy arms).
    """

    plan: Any
    manifest: dict[str, Any]
    records: pd.DataFrame
    subjects: pd.DataFrame
    conformance: ConformanceReport
    derivations: tuple[dict[str, Any], ...]
    dummy_arms_seed: int | None = None
    reason_column: str | None = None
    cut_off: CutOff | None = None
    blinding: ArmBlinding | None = None
    # Analysis data built once per (endpoint, estimand, population) and per (endpoint,
    # population) before the estimand's strategies: a run asks for the same frames dozens of
    # times (flows, every analysis, subgroups, the analysis dataset).  Not part of the value.
    _built: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    # ------------------------------------------------------------------ summaries
    def summary(self) -> dict[str, Any]:
        """The ``data`` section of results.json."""
        keys = ("file", "format", "size", "sha256", "rows", "columns")
        data = {k: self.manifest.get(k) for k in keys}
        data["participants"] = int(len(self.subjects))
        data["cut_off"] = (self.cut_off or CutOff(None, "none", None)).to_dict()
        return data

    def blind(self, value: Any) -> Any:
        """``value`` (text, or dicts and lists of it) with every real arm name replaced, in a dry run."""
        return self.blinding.deep(value) if self.blinding is not None else value

    def blinded_raw(self, raw: RawCut) -> RawCut:
        """``raw`` as a dry run may show it: each participant's treatment column holds their dummy arm."""
        if self.blinding is None:
            return raw
        cols = self.plan.columns
        arms = dict(zip(self.subjects[cols.subject], self.subjects[cols.arm]))
        frame = raw.frame.assign(**{cols.arm: raw.frame[cols.subject].map(arms)})
        return RawCut(frame, dict(raw.manifest), raw.first_row, raw.row_word, raw.typed)

    def to_dict(self) -> dict[str, Any]:
        """JSON-able: the data summary, every check and every derivation (no records)."""
        return {"data": self.summary(), "dummy_arms_seed": self.dummy_arms_seed,
                "conformance": self.conformance.to_dict() | {"derivations": [dict(d) for d in self.derivations]}}

    def population_counts(self) -> pd.DataFrame:
        """Participants per population (rows) and arm (columns), with a total."""
        rows = []
        for population in self.plan.populations:
            members = self.subjects[_members(self.subjects, population)]
            rows.append(self._per_arm(population.label, members))
        return pd.DataFrame(rows, columns=["population", *self._arm_order(), "Total"])

    def disposition(self) -> pd.DataFrame:
        """Per arm: randomised, in each population, observed at the primary visit, events, reasons."""
        subjects, cols = self.subjects, self.plan.columns
        rows = [self._per_arm("Randomised", subjects)]
        rows += [self._per_arm(f"In population: {p.label}", subjects[_members(subjects, p)])
                 for p in self.plan.populations]
        endpoint = self.plan.endpoints[0]
        population = self._primary_population(endpoint)
        members = subjects[_members(subjects, population)] if population is not None else subjects
        observed = self._observed_at(endpoint, endpoint.primary_visit)
        # Counted in the primary analysis' population, as the participant flow counts it.
        where = f", {population.label}" if population is not None else ""
        # The endpoint in words (its label without the explanation in brackets), never its plan id.
        name = re.sub(r"\s*\([^()]*\)\s*$", "", endpoint.label).strip() or endpoint.label
        rows.append(self._per_arm(f"Observed at {endpoint.primary_visit} ({name}{where})",
                                  members[members[cols.subject].isin(observed)]))
        for event in self.plan.intercurrent_events:
            if event.day_column in subjects.columns:
                rows.append(self._per_arm(f"Event: {event.label}", subjects[subjects[event.day_column].notna()]))
        if self.reason_column:
            reasons = subjects[self.reason_column]
            rows.append(self._per_arm("Left the study early", subjects[reasons.notna()]))
            for reason in sorted(reasons.dropna().unique()):
                rows.append(self._per_arm(f"  Reason: {reason}", subjects[reasons == reason]))
        return pd.DataFrame(rows, columns=["measure", *self._arm_order(), "Total"])

    def _primary_population(self, endpoint):
        primary = endpoint.analyses.primary
        population_id = primary.population or (self.plan.estimand(primary.estimand).population
                                               if primary.estimand else None)
        return _find(self.plan.populations, population_id, "population") if population_id else None

    def visit_assignment(self) -> pd.DataFrame:
        """Post-baseline records per analysis visit, by what the visit assignment did with them.

        With windowing on, a record is kept at the visit it was recorded as, moved to another
        visit whose window holds its study day, or placed by its study day when its own label is
        not a scheduled visit (an unscheduled visit); records not analysed are counted with the
        reason (another record closer to the planned day, or outside every window).  With
        windowing off every analysed record stays at the visit the data names.
        """
        plan, cols = self.plan, self.plan.columns
        post = self.records[self.records[ROLE_COLUMN] == "post"]
        scheduled = set(plan.visit_labels)
        rows = []
        for visit in plan.visit_labels:
            collected = post.loc[post[cols.visit] == visit, VISIT_COLLECTED]
            if not plan.visits.windowing:
                rows.append((visit, "kept at the visit the data names (no windowing)", int(len(collected))))
                continue
            rows.append((visit, "kept at the visit it was recorded as", int((collected == visit).sum())))
            rows.append((visit, "moved here from another scheduled visit: its study day is in this visit's window",
                         int((collected.isin(scheduled) & (collected != visit)).sum())))
            rows.append((visit, "placed here by its study day: recorded under a label outside the schedule",
                         int((~collected.isin(scheduled)).sum())))
            rejected = sum(len(e.get("rejected_days") or []) for e in self.derivations
                           if e.get("step") == "visit_window" and e.get("visit") == visit)
            rows.append((visit, "not analysed: another record of the participant is closer to the planned day",
                         int(rejected)))
        if plan.visits.windowing:
            outside = sum(len(e.get("rejected_days") or []) for e in self.derivations
                          if e.get("step") == "visit_window" and e.get("visit") is None)
            rows.append(("(no visit)", "not analysed: the study day is outside every visit window", int(outside)))
        else:
            unflagged = sum(int(e.get("count") or 0) for e in self.derivations if e.get("step") == "analysis_flag")
            if cols.analysis_flag:
                rows.append(("(no visit)", f"not analysed: not flagged {cols.analysis_flag} = Y in the data",
                             unflagged))
            other = sum(c.count for c in self.conformance.checks if c.id == "known_visits" and c.severity == "warning")
            rows.append(("(no visit)", "not analysed: the visit label is not in the schedule", int(other)))
        return pd.DataFrame(rows, columns=["visit", "what_happened", "records"])

    def _arm_order(self) -> list[str]:
        return list(self.plan.arm_codes)

    def _per_arm(self, label: str, members: pd.DataFrame) -> list[Any]:
        counts = members[self.plan.columns.arm].value_counts()
        return [label, *(int(counts.get(a, 0)) for a in self._arm_order()), int(len(members))]

    def _observed_at(self, endpoint, visit: str) -> set[Any]:
        cols = self.plan.columns
        records = self._endpoint_records(endpoint)
        outcome = _outcome_column(self.plan, endpoint)
        hit = (records[cols.visit] == visit) & records[outcome].notna() & (records[ROLE_COLUMN] == "post")
        return set(records.loc[hit, cols.subject])

    def _endpoint_records(self, endpoint) -> pd.DataFrame:
        cols = self.plan.columns
        if endpoint.parameter and cols.parameter in self.records.columns:
            return self.records[self.records[cols.parameter] == endpoint.parameter]
        return self.records

    # ------------------------------------------------------------------ analysis data
    def analysis_data(self, endpoint_id: str, estimand_id: str | None = None,
                      population_id: str | None = None) -> AnalysisData:
        """The analysis data of an endpoint under an estimand's strategies, in a population.

        Built once per (endpoint, estimand, population) and handed out as a fresh copy each
        time, so a caller that adds or changes columns never changes what the next one gets.
        """
        plan = self.plan
        endpoint = _find(plan.endpoints, endpoint_id, "endpoint")
        estimand = _find(plan.estimands, estimand_id, "estimand") if estimand_id else None
        population_id = population_id or (estimand.population if estimand else None)
        population = _find(plan.populations, population_id, "population") if population_id else None
        key = ("data", endpoint.id, estimand.id if estimand else None, population.id if population else None)
        if key not in self._built:
            self._built[key] = self._build_analysis_data(endpoint, estimand, population)
        built = self._built[key]
        return replace(built, frame=built.frame.copy())

    def _build_analysis_data(self, endpoint, estimand, population) -> AnalysisData:
        plan = self.plan
        outcome = _outcome_column(plan, endpoint)
        frame = _apply_events(plan, estimand, self._observed_grid(endpoint, population), outcome, self._visit_days())
        cols = plan.columns
        return AnalysisData(
            frame=frame.reset_index(drop=True), subject=cols.subject, arm=cols.arm, visit=cols.visit,
            outcome=outcome, baseline=_baseline_column(plan),
            visits=plan.visit_labels, visit_days=self._visit_days(), arms=plan.arm_codes,
            reference=plan.arms.reference, primary_visit=endpoint.primary_visit,
            population=population.id if population else None, estimand=estimand.id if estimand else None,
            endpoint=endpoint.id, due_judged=bool(self.cut_off and self.cut_off.judged))

    def _observed_grid(self, endpoint, population) -> pd.DataFrame:
        """The participant × visit grid of a population with its observed and due flags (shared, never changed:
        ``_apply_events`` works on a copy)."""
        key = ("grid", endpoint.id, population.id if population else None)
        if key in self._built:
            return self._built[key]
        plan = self.plan
        subjects = self.subjects
        if population is not None:
            subjects = subjects[_members(subjects, population)]
        frame = self._grid(endpoint, subjects)
        frame[OBSERVED] = frame[_outcome_column(plan, endpoint)].notna()
        frame[DUE] = due_flags(frame, subject=plan.columns.subject, visit=plan.columns.visit,
                               observed=frame[OBSERVED], schedule=plan.visits.schedule, cut_off=self.cut_off)
        self._built[key] = frame
        return frame

    def _visit_days(self) -> dict[str, float | None]:
        return {v.label: v.day for v in self.plan.visits.schedule}

    def _grid(self, endpoint, subjects: pd.DataFrame) -> pd.DataFrame:
        """Every participant × scheduled visit, the analysed record where there is one."""
        cols, plan = self.plan.columns, self.plan
        records = self._endpoint_records(endpoint)
        post = records[records[ROLE_COLUMN] == "post"].drop(columns=[ROLE_COLUMN])
        labels = np.array(plan.visit_labels, dtype=object)
        ids = subjects[cols.subject].to_numpy()
        grid = pd.DataFrame({cols.subject: np.repeat(ids, len(labels)), cols.visit: np.tile(labels, len(ids))})
        subject_columns = [c for c in subjects.columns if c != cols.subject]
        record_columns = [c for c in post.columns if c not in subject_columns or c == cols.subject]
        frame = grid.merge(post[record_columns], on=[cols.subject, cols.visit], how="left")
        frame = frame.merge(subjects, on=cols.subject, how="left")
        baseline = _baseline_column(plan)
        base_values = self._baseline_values(endpoint)
        frame[baseline] = frame[cols.subject].map(base_values).astype(float)
        if cols.visit_number:
            frame[cols.visit_number] = frame[cols.visit].map({v.label: float(v.order) for v in plan.visits.schedule})
        order = {label: i for i, label in enumerate(plan.visit_labels)}
        frame["__order"] = frame[cols.visit].map(order)
        frame = frame.sort_values([cols.subject, "__order"], kind="stable").drop(columns="__order")
        # The source's column order first, then what was derived.
        source = [c for c in self.records.columns if c in frame.columns]
        return frame[source + [c for c in frame.columns if c not in source]]

    def _baseline_values(self, endpoint) -> pd.Series:
        cols, baseline = self.plan.columns, _baseline_column(self.plan)
        records = self._endpoint_records(endpoint)
        values = records[[cols.subject, baseline]].dropna().drop_duplicates(cols.subject)
        return values.set_index(cols.subject)[baseline]



def _find(items, item_id: str, kind: str):
    for item in items:
        if item.id == item_id:
            return item
    known = ", ".join(i.id for i in items)
    raise PlanError(f"unknown {kind} {item_id!r}",
                    [Problem(code=f"data.unknown_{kind}", message=f"the plan declares no {kind} {item_id!r}",
                             expected=f"one of {known}", got=repr(item_id))])


def _members(subjects: pd.DataFrame, population) -> pd.Series:
    if not population.flag:
        return pd.Series(True, index=subjects.index)
    return subjects[population.flag] == "Y"


def _outcome_column(plan, endpoint) -> str:
    if endpoint.analysed == "change":
        return plan.columns.change or "CHG"
    return plan.columns.value


def _baseline_column(plan) -> str:
    return plan.columns.baseline or "BASE"


# --------------------------------------------------------------------------- intercurrent events
def _apply_events(plan, estimand, frame: pd.DataFrame, outcome: str,
                  visit_days: dict[str, float | None]) -> pd.DataFrame:
    """Name the governing event of each visit and apply its strategy to the outcome."""
    strategies = {h.event: h for h in estimand.intercurrent_events} if estimand else {}
    governing, strategy = _governing_events(plan, strategies, frame, _visit_study_day(frame, plan.columns, visit_days))
    frame = frame.copy()
    frame["intercurrent_event"] = governing
    frame["strategy"] = strategy
    hypothetical = frame["strategy"].eq("hypothetical").to_numpy()
    frame["outcome_set_missing"] = hypothetical & frame[outcome].notna().to_numpy()
    frame.loc[hypothetical, outcome] = np.nan
    # A visit not yet due has no value to replace: the composite value waits for it too.
    composite = frame["strategy"].eq("composite").to_numpy() & frame[DUE].to_numpy(dtype=bool)
    values = frame["intercurrent_event"].map(
        {e: h.composite_value for e, h in strategies.items() if h.strategy == "composite"})
    frame.loc[composite, outcome] = values[composite].astype(float)
    frame["outcome_set_composite"] = composite
    return frame


def _governing_events(plan, strategies: dict[str, Any], frame: pd.DataFrame,
                      visit_day: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per row: the earliest outcome-changing event on or before the visit, else the earliest event."""
    events = [e for e in plan.intercurrent_events if e.day_column in frame.columns]
    governing = np.full(len(frame), None, dtype=object)
    strategy = np.full(len(frame), None, dtype=object)
    if not events:
        return governing, strategy
    days = np.column_stack([frame[e.day_column].astype(float).to_numpy() for e in events])
    happened = ~np.isnan(days) & (days <= visit_day[:, None])
    changes = np.array([e.id in strategies and strategies[e.id].strategy in ("hypothetical", "composite")
                        for e in events])
    # All rows at once (a row-by-row loop took seconds on a large cut): among the events that
    # happened, the earliest outcome-changing one if any, else the earliest; ties: plan order.
    deciding = happened & changes[None, :]
    pool = np.where(deciding.any(axis=1)[:, None], deciding, happened)
    rows = np.flatnonzero(pool.any(axis=1))
    if not len(rows):
        return governing, strategy
    chosen = np.nanargmin(np.where(pool[rows], days[rows], np.nan), axis=1)
    ids = np.array([e.id for e in events], dtype=object)
    handled = np.array([strategies[e.id].strategy if e.id in strategies else None for e in events], dtype=object)
    governing[rows] = ids[chosen]
    strategy[rows] = handled[chosen]
    return governing, strategy


def _visit_study_day(frame: pd.DataFrame, cols, visit_days: dict[str, float | None]) -> np.ndarray:
    planned = frame[cols.visit].map(visit_days).astype(float).to_numpy()
    if cols.study_day and cols.study_day in frame.columns:
        actual = frame[cols.study_day].astype(float).to_numpy()
        return np.where(np.isnan(actual), planned, actual)
    return planned


# --------------------------------------------------------------------------- preparing a cut
def prepare_cut(plan, raw: RawCut, dummy_arms_seed: int | None = None, cut_off: dt.date | None = None,
                today: dt.date | None = None) -> DataCut:
    """Check ``raw`` against ``plan`` (DataError on any error-severity failure) and derive.

    ``cut_off``: the database cut-off (default: the latest date in the data, with a note).
    ``dummy_arms_seed``: a blinded dry run (see :mod:`trialcut.data.dummy_arms`): the cut's
    treatment column, if any, is never read; the returned cut's ``plan`` names the dummy arms
    and ``blinding`` blinds anything else that might name a real arm.
    """
    blinding = None
    if dummy_arms_seed is not None:
        blinding = blinding_for(plan)
        plan = blinding.plan(plan)
        raw = blind_raw(raw, plan.columns.arm, plan.arms.reference)
    resolved, checked = _checked_with_cut_off(plan, raw, cut_off, today)
    log = list(checked.derivations)
    work = _derive_baseline_and_change(plan, checked.records, log)
    records = _analysed_records(plan, work)
    reason = _reason_column(plan, records)
    subjects = _subjects_table(plan, records, reason)
    if dummy_arms_seed is not None:
        subjects, records = _dummy_arms(plan, subjects, records, dummy_arms_seed, log)
    return DataCut(plan=plan, manifest=dict(raw.manifest), records=records, subjects=subjects,
                   conformance=checked.report, derivations=tuple(log),
                   dummy_arms_seed=dummy_arms_seed, reason_column=reason, cut_off=resolved, blinding=blinding)


def _checked_with_cut_off(plan, raw: RawCut, cut_off: dt.date | None, today: dt.date | None):
    """The cut-off and the conformance checks; their problems are raised together, in one pass."""
    date_error = None
    try:
        resolved = resolve_cut_off(plan, raw, cut_off, today)
    except DataError as error:
        date_error, resolved = error, None
    try:
        checked = check_cut(plan, raw)
    except DataError as error:
        if date_error is None:
            raise
        raise DataError(str(error), [*error.problems, *date_error.problems]) from None
    if date_error is not None:
        raise date_error
    return resolved, checked


def _derive_baseline_and_change(plan, work: pd.DataFrame, log: list[dict[str, Any]]) -> pd.DataFrame:
    cols = plan.columns
    work = work.copy()
    keys = [cols.subject] + ([cols.parameter] if cols.parameter and cols.parameter in work.columns else [])
    baseline, change = _baseline_column(plan), plan.columns.change or "CHG"
    from_record = (work[work[ROLE] == "baseline"][keys + [cols.value]]
                   .drop_duplicates(keys).rename(columns={cols.value: "__base_record"}))
    work = work.merge(from_record, on=keys, how="left").set_index(work.index)
    if baseline not in work.columns:
        work[baseline] = np.nan
    fill = work[baseline].isna() & work["__base_record"].notna()
    work.loc[fill, baseline] = work.loc[fill, "__base_record"]
    if fill.any():
        log.append({"step": "baseline", "count": int(fill.sum()),
                    "reason": f"{baseline} taken from the baseline record's {cols.value} where empty or absent"})
    if change not in work.columns:
        work[change] = np.nan
    post = work[ROLE] == "post"
    derive = post & work[change].isna() & work[cols.value].notna() & work[baseline].notna()
    work.loc[derive, change] = work.loc[derive, cols.value] - work.loc[derive, baseline]
    if derive.any():
        log.append({"step": "change_from_baseline", "count": int(derive.sum()),
                    "reason": f"{change} = {cols.value} − {baseline} where {change} was empty or absent"})
    return work.drop(columns="__base_record")


def _analysed_records(plan, work: pd.DataFrame) -> pd.DataFrame:
    cols = plan.columns
    keep = (work[ROLE] == "baseline") | work[CHOSEN].astype(bool)
    records = work[keep].copy()
    records[VISIT_COLLECTED] = records[cols.visit] if cols.visit in records.columns else None
    post = records[ROLE] == "post"
    records.loc[post, cols.visit] = records.loc[post, ANALYSIS_VISIT]
    if cols.visit_number and cols.visit_number in records.columns:
        orders = {v.label: float(v.order) for v in plan.visits.schedule}
        records.loc[post, cols.visit_number] = records.loc[post, cols.visit].map(orders)
    records = records.rename(columns={ROW: SOURCE_ROW, ROLE: ROLE_COLUMN})
    records = records.drop(columns=[ANALYSIS_VISIT, CHOSEN])
    return records.sort_values(SOURCE_ROW, kind="stable").reset_index(drop=True)


def _reason_column(plan, records: pd.DataFrame) -> str | None:
    name = getattr(plan.columns, "discontinuation_reason", None) or DEFAULT_REASON_COLUMN
    return name if name in records.columns else None


def _subjects_table(plan, records: pd.DataFrame, reason: str | None) -> pd.DataFrame:
    """One row per participant: arm, strata, flags, event days, reason and other constant columns."""
    subject = plan.columns.subject
    wanted = [plan.columns.arm, *subject_level_columns(plan)] + ([reason] if reason else [])
    cols = plan.columns
    # Columns that describe a record, never a participant, even when every participant has
    # a single record (and so every column looks constant within participants).
    per_record = {cols.visit, cols.value, cols.change, cols.study_day, cols.visit_number,
                  SOURCE_ROW, VISIT_COLLECTED, ROLE_COLUMN}
    constant = [c for c in records.columns if c not in wanted and c != subject and not c.startswith("__")
                and c not in per_record and _constant_within(records, subject, c)]
    columns = list(dict.fromkeys([c for c in wanted if c in records.columns] + constant))
    grouped = records.groupby(subject, sort=True, dropna=True)[columns].first()
    return grouped.reset_index()


def _constant_within(records: pd.DataFrame, subject: str, column: str) -> bool:
    if column in (SOURCE_ROW, ROLE_COLUMN, VISIT_COLLECTED):
        return False
    try:
        return bool((records.groupby(subject)[column].nunique(dropna=False) <= 1).all())
    except TypeError:
        return False


def _dummy_arms(plan, subjects: pd.DataFrame, records: pd.DataFrame, seed: int,
                log: list[dict[str, Any]]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Allocate dummy arms at random in permuted blocks within strata (the real arms are never read)."""
    subject, arm = plan.columns.subject, plan.columns.arm
    strata = [s for s in plan.arms.strata if s in subjects.columns]
    subjects = subjects.sort_values(subject, kind="stable").reset_index(drop=True)
    dummy = allocate(subjects, subject, strata, plan.arm_codes, seed)
    subjects = subjects.assign(**{arm: dummy})
    records = records.assign(**{arm: records[subject].map(dict(zip(subjects[subject], dummy)))})
    log.append({"step": "dummy_arms", "seed": int(seed), "count": int(len(subjects)),
                "reason": "dummy arms " + ", ".join(plan.arm_codes) + " allocated at random in permuted blocks"
                          + (f" within strata {', '.join(strata)}" if strata else "")
                          + "; the data's treatment column, if any, was not read (blinded dry run: results "
                            "carry no treatment information)"})
    return subjects, records
