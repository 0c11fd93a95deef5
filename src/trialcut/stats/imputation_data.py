"""The imputation's prepared data: one long frame turned into the wide arrays the sampler uses.

yᵢ is participant i's post-baseline visit vector (length T, NaN where missing), xᵢ their arm and
centred covariates, and d their first visit affected by an intercurrent event (T if none), as in
Carpenter, Roger & Kenward (2013, J Biopharm Stat 23:1352–1371).  Bad input raises
:class:`ModelSpecificationError` naming the column, visit or participants.  The design rank
check shared by the imputation model and the completed-data analysis also lives here.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem

@dataclass(frozen=True)
class ImputationData:
    """Wide arrays for the sampler; arms[0] is the reference arm."""

    subjects: tuple[Any, ...]
    visits: tuple[str, ...]
    arms: tuple[str, ...]
    outcome: np.ndarray          # (n, T), NaN where missing
    arm_index: np.ndarray        # (n,), 0 = reference
    covariates: np.ndarray       # (n, q), centred over all participants
    covariate_names: tuple[str, ...]
    deviation: np.ndarray        # (n,), first visit index affected by an intercurrent event; T if none
    # (n, T): the frame has a row for this participant and visit, i.e. the visit was due at the
    # cut-off.  A cell without a row is a visit not yet due: the sampler carries it as a latent
    # value (ignorable, like any value the cut-off withholds), but it is never counted as
    # imputed, never shifted and never analysed.  None: every visit is due.
    scheduled: np.ndarray | None = None

    @property
    def missing(self) -> np.ndarray:
        return np.isnan(self.outcome)

    @property
    def due(self) -> np.ndarray:
        return np.ones(self.outcome.shape, dtype=bool) if self.scheduled is None else self.scheduled

    @property
    def imputed(self) -> np.ndarray:
        """(n, T): values imputed and analysed: missing at a visit that was due."""
        return self.missing & self.due

    @property
    def after_event(self) -> np.ndarray:
        """(n, T): an imputed value at or after the participant's first affected visit."""
        return self.imputed & (np.arange(len(self.visits))[None, :] >= self.deviation[:, None])


def prepare_data(frame: pd.DataFrame, *, subject: str, arm: str, visit: str, outcome: str,
                 visits: Sequence[str], reference: str, covariates: Sequence[str] = (),
                 event: str | Mapping[Any, Any] | None = None,
                 arms: Sequence[str] | None = None) -> ImputationData:
    """Long frame (one row per participant × scheduled visit) to the sampler's arrays.

    ``event``: None (every missing value is MAR), the name of a boolean column that is true
    on rows at or after an intercurrent event, or a mapping participant -> first affected
    visit label (None when unaffected).
    """
    _check_columns(frame, [subject, arm, visit, outcome, *covariates]
                   + ([event] if isinstance(event, str) else []))
    visits = tuple(str(v) for v in visits)
    long = frame.assign(**{visit: frame[visit].astype(str)})
    _check_visits(long, subject, visit, visits)
    per_subject = long.groupby(subject, sort=True, observed=True)
    arm_of = per_subject[arm].first()
    arm_order = _arm_order(arm_of, reference, arms)
    wide = long.pivot(index=subject, columns=visit, values=outcome).reindex(index=arm_of.index, columns=list(visits))
    rows = long.assign(_row=1.0).pivot(index=subject, columns=visit, values="_row")
    scheduled = rows.reindex(index=arm_of.index, columns=list(visits)).notna().to_numpy()
    design, names = _covariate_matrix(long, subject, covariates, arm_of.index)
    deviation = _deviation(long, subject, visit, visits, event, arm_of.index)
    return ImputationData(
        subjects=tuple(arm_of.index), visits=visits, arms=arm_order,
        outcome=wide.to_numpy(dtype=float), arm_index=arm_of.map({a: k for k, a in enumerate(arm_order)}).to_numpy(int),
        covariates=design - design.mean(axis=0), covariate_names=names, deviation=deviation,
        scheduled=None if scheduled.all() else scheduled,
    )


def _check_columns(frame, columns) -> None:
    absent = [c for c in columns if c not in frame.columns]
    if absent:
        raise ModelSpecificationError("columns are missing from the data", [
            Problem(code="stats.missing_column", message=f"column {c!r} is not in the data", field=c,
                    expected="one of " + ", ".join(map(str, frame.columns))) for c in absent])


def _check_visits(long, subject, visit, visits) -> None:
    problems = []
    unknown = sorted(set(long[visit]) - set(visits))
    if unknown:
        problems.append(Problem(code="stats.unknown_visit", message="rows at visits outside the schedule",
                                field=visit, expected=", ".join(visits), got=", ".join(unknown[:5])))
    duplicated = long[long.duplicated([subject, visit], keep=False)]
    if len(duplicated):
        problems.append(Problem(code="stats.duplicate_visit", message="more than one row per participant and visit",
                                field=visit, rows=tuple(duplicated[subject].unique()[:5])))
    if problems:
        raise ModelSpecificationError("the data do not have one row per participant and visit", problems)


def _arm_order(arm_of: pd.Series, reference: str, arms) -> tuple[str, ...]:
    present = [str(a) for a in pd.unique(arm_of)]
    order = [str(a) for a in arms] if arms is not None else sorted(present)
    if reference not in present or set(present) - set(order):
        raise ModelSpecificationError("the arms do not match the data", [
            Problem(code="stats.arms", message="the reference arm and every arm in the data must be known",
                    expected=f"reference {reference!r} among {order}", got=", ".join(present))])
    return (reference, *[a for a in order if a != reference and a in present])


def _covariate_matrix(long, subject, covariates, index) -> tuple[np.ndarray, tuple[str, ...]]:
    if not covariates:
        return np.empty((len(index), 0)), ()
    per_subject = long.groupby(subject, sort=True, observed=True)
    varying = [c for c in covariates if (per_subject[c].nunique(dropna=False) > 1).any()]
    values = per_subject[list(covariates)].first().reindex(index)
    absent = [c for c in covariates if values[c].isna().any()]
    problems = [Problem(code="stats.covariate_varies", message=f"covariate {c!r} changes within a participant",
                        field=c, hint="imputation covariates are measured once, before randomisation")
                for c in varying]
    problems += [Problem(code="stats.covariate_missing", message=f"covariate {c!r} is missing",
                         field=c, rows=tuple(values.index[values[c].isna()][:5])) for c in absent]
    if problems:
        raise ModelSpecificationError("imputation covariates must be complete and fixed per participant", problems)
    blocks, names = [], []
    for c in covariates:
        column = values[c]
        if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
            blocks.append(column.to_numpy(float)[:, None])
            names.append(c)
        else:   # indicators of every level but the first, as in the analysis model
            dummies = pd.get_dummies(column.astype(str), prefix=c, prefix_sep="=", drop_first=True, dtype=float)
            blocks.append(dummies.to_numpy())
            names.extend(dummies.columns)
    return np.column_stack(blocks), tuple(names)


def _deviation(long, subject, visit, visits, event, index) -> np.ndarray:
    position = {v: j for j, v in enumerate(visits)}
    first = pd.Series(len(visits), index=index, dtype=int)
    if event is None:
        return first.to_numpy()
    if isinstance(event, str):
        flagged = long[long[event].fillna(False).astype(bool)]
        found = flagged[visit].map(position).groupby(flagged[subject]).min()
    else:
        found = pd.Series({s: position[str(v)] for s, v in event.items() if v is not None and not pd.isna(v)},
                          dtype=int)
    found = found[found.index.isin(index)]
    first.loc[found.index] = found.astype(int)
    return first.to_numpy()

def _full_rank(r: np.ndarray, design: np.ndarray, tolerance: float = 1e-10) -> bool:
    """|r_jj| against the length of column j: a test that does not depend on the columns'
    units (the same rule as the per-visit analysis of covariance)."""
    lengths = np.linalg.norm(design, axis=0)
    return bool(np.all(lengths > 0) and np.all(np.abs(np.diag(r)) > tolerance * lengths))
