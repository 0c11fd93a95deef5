"""From a long data frame to what the repeated-measures fit needs, checked once at the boundary.

Everything the likelihood touches per iteration is a sum over the participants who share a
missing-visit pattern (and a covariance group): for pattern S and visits j, k in S,
T_xx[j, k] = sum_i x_ij' x_ik, T_xy[j, k] = sum_i x_ij' y_ik and T_yy[j, k] = sum_i y_ij y_ik.
With these, X'V^-1 X = sum_S sum_jk (Sigma_S^-1)_jk T_xx[j, k] and so on, so the cost of one
iteration does not grow with the number of participants.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from trialcut.errors import ModelSpecificationError, Problem


@dataclass
class Pattern:
    """Participants of one covariance group with outcomes at the same visits."""

    group: int
    visits: np.ndarray          # indices into the planned visits, ascending
    subjects: np.ndarray        # positions in Design.subject_labels
    x: np.ndarray               # (n, s, p)
    y: np.ndarray               # (n, s)
    t_xx: np.ndarray = field(init=False)   # (s, s, p, p)
    t_xy: np.ndarray = field(init=False)   # (s, s, p)
    t_yy: np.ndarray = field(init=False)   # (s, s)

    def __post_init__(self):
        n, s, p = self.x.shape
        # One matrix product gives every pair-of-visits sum at once.
        stacked = np.concatenate([self.x, self.y[:, :, None]], axis=2).reshape(n, s * (p + 1))
        cross = (stacked.T @ stacked).reshape(s, p + 1, s, p + 1).transpose(0, 2, 1, 3)
        self.t_xx = np.ascontiguousarray(cross[:, :, :p, :p])
        self.t_xy = np.ascontiguousarray(cross[:, :, :p, p])
        self.t_yy = np.ascontiguousarray(cross[:, :, p, p])

    @property
    def n(self) -> int:
        return self.x.shape[0]


@dataclass
class Design:
    visits: tuple
    arms: tuple                     # reference first
    groups: tuple                   # covariance groups; (None,) without covariance_by
    visit_times: np.ndarray
    term_names: tuple[str, ...]     # each column of X in plain words
    term_keys: tuple[dict, ...]     # each column as data: effect (joint-test term), arm, visit, covariate, level
    term_blocks: dict[str, list[int]]   # "arm", "visit", "arm_by_visit", covariate, "<c>_by_visit"
    covariate_columns: dict[str, list[int]]   # covariate -> its main-effect columns
    participant_level: np.ndarray   # bool per column: the same value at every visit of each participant
    patterns: list[Pattern]
    subject_labels: np.ndarray
    n_obs: int
    n_subjects: int
    excluded_subjects: tuple
    cell_means: np.ndarray          # (arms, visits, p): rows of the marginal means
    covariate_summary: dict[str, Any]
    pair_counts: np.ndarray         # (groups, k, k) participants with both visits observed

    @property
    def n_parameters(self) -> int:
        return len(self.term_names)


def _fail(problems: list[Problem]) -> None:
    if problems:
        raise ModelSpecificationError("; ".join(p.render() for p in problems), problems)


def _scalar(value: Any) -> Any:
    """Labels as plain Python values (numpy scalars would leak into results)."""
    return value.item() if isinstance(value, np.generic) else value


def _is_categorical(series: pd.Series) -> bool:
    return not pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series)


def _levels(series: pd.Series) -> list:
    present = pd.unique(series.dropna())
    if isinstance(series.dtype, pd.CategoricalDtype):
        return [c for c in series.cat.categories if c in set(present)]
    try:
        return sorted(present)
    except TypeError:
        return sorted(present, key=str)


def _first_rows(frame: pd.DataFrame, mask: pd.Series, subject: str, limit: int = 5) -> tuple:
    return tuple(frame.loc[mask, subject].drop_duplicates().head(limit).tolist())


def _check_columns(data, roles: dict[str, str], covariates, covariates_by_visit) -> list[Problem]:
    problems = []
    if not isinstance(data, pd.DataFrame):
        raise ModelSpecificationError(
            f"data: expected a pandas DataFrame in long form; got {type(data).__name__}",
            [Problem("mmrm.data_type", "data must be a pandas DataFrame", field="data",
                     expected="DataFrame", got=type(data).__name__)])
    for role, column in roles.items():
        if column is not None and column not in data.columns:
            problems.append(Problem("mmrm.unknown_column", f"{role} column '{column}' is not in the data",
                                    field=role, expected="one of " + ", ".join(map(str, data.columns[:20])),
                                    got=repr(column)))
    fixed = {roles[r] for r in ("outcome", "subject", "visit", "arm")}
    for name in list(covariates) + list(covariates_by_visit):
        if name not in data.columns:
            problems.append(Problem("mmrm.unknown_column", f"covariate '{name}' is not in the data",
                                    field="covariates", got=repr(name)))
        elif name in fixed:
            problems.append(Problem("mmrm.covariate_is_role", f"covariate '{name}' is already the outcome, "
                                    "subject, visit or arm column", field="covariates", got=repr(name)))
    return problems


def build_design(data: pd.DataFrame, *, outcome: str, subject: str, visit: str, arm: str, reference: Any,
                 visits: Sequence | None, covariates: Sequence[str], covariates_by_visit: Sequence[str],
                 covariance_by: str | None, visit_times: Mapping | None) -> Design:
    covariates, covariates_by_visit = tuple(covariates), tuple(covariates_by_visit)
    roles = {"outcome": outcome, "subject": subject, "visit": visit, "arm": arm, "covariance_by": covariance_by}
    _fail(_check_columns(data, roles, covariates, covariates_by_visit))
    main_effects = tuple(dict.fromkeys(covariates + covariates_by_visit))
    used = list(dict.fromkeys([subject, visit, arm, outcome, *main_effects] + ([covariance_by] if covariance_by else [])))
    frame = data[used]          # a new frame: the caller's data is never modified
    problems: list[Problem] = []

    if not pd.api.types.is_numeric_dtype(frame[outcome]) or pd.api.types.is_bool_dtype(frame[outcome]):
        _fail([Problem("mmrm.outcome_not_numeric", f"outcome column '{outcome}' is not numeric",
                       field=outcome, got=str(frame[outcome].dtype))])
    values = frame[outcome].to_numpy(dtype=float)
    infinite = np.isinf(values)
    if infinite.any():
        problems.append(Problem("mmrm.non_finite_outcome", f"outcome '{outcome}' has infinite values",
                                field=outcome, rows=_first_rows(frame, pd.Series(infinite, frame.index), subject),
                                hint="set them to missing or correct them"))
    observed_mask = pd.Series(np.isfinite(values), index=frame.index)
    observed = frame[observed_mask]

    for column in [subject, visit, arm] + ([covariance_by] if covariance_by else []) + list(main_effects):
        missing = observed[column].isna()
        if missing.any():
            problems.append(Problem("mmrm.missing_value", f"column '{column}' is missing on rows with an observed outcome",
                                    field=column, rows=_first_rows(observed, missing, subject),
                                    hint="complete the column or set those outcomes to missing"))
    _fail(problems)

    # Visits
    if visits is None:
        if isinstance(frame[visit].dtype, pd.CategoricalDtype):
            present = set(pd.unique(frame[visit].dropna()))
            visits = [v for v in frame[visit].cat.categories if v in present]
        else:
            visits = list(pd.unique(frame[visit].dropna()))
    visits = tuple(_scalar(v) for v in visits)
    if len(set(visits)) != len(visits):
        problems.append(Problem("mmrm.duplicate_visit_label", "visits lists a visit twice", field="visits",
                                got=repr(visits)))
    unknown = ~observed[visit].isin(visits)
    if unknown.any():
        labels = sorted(map(str, pd.unique(observed.loc[unknown, visit])))
        problems.append(Problem("mmrm.unknown_visit", f"visit(s) {', '.join(labels)} are in the data but not in `visits`",
                                field=visit, expected="one of " + ", ".join(map(str, visits)), got=", ".join(labels),
                                rows=_first_rows(observed, unknown, subject)))
    duplicated = observed.duplicated([subject, visit], keep=False)
    if duplicated.any():
        first = observed[duplicated].iloc[0]
        problems.append(Problem("mmrm.duplicate_visit", f"participant {first[subject]} has visit {first[visit]} "
                                "more than once", field=f"{subject}/{visit}",
                                rows=_first_rows(observed, duplicated, subject),
                                hint="keep one record per participant and visit"))
    arms_present = _levels(frame[arm])
    if reference not in arms_present:
        problems.append(Problem("mmrm.unknown_reference", f"reference arm {reference!r} is not in column '{arm}'",
                                field="reference", expected="one of " + ", ".join(map(str, arms_present)),
                                got=repr(reference)))
    for column, label in [(arm, "arm")] + ([(covariance_by, "covariance_by")] if covariance_by else []):
        varying = observed.groupby(subject, sort=False)[column].nunique() > 1
        if varying.any():
            problems.append(Problem("mmrm.varying_within_participant",
                                    f"{label} column '{column}' changes within participant {varying.index[varying][0]}",
                                    field=column, rows=tuple(varying.index[varying][:5])))
    _fail(problems)

    arms = (_scalar(reference),) + tuple(_scalar(a) for a in _levels(observed[arm]) if a != reference)
    unanalysed = [a for a in arms_present if a not in arms]
    if unanalysed:
        warnings.warn(f"arm(s) {', '.join(map(str, unanalysed))} of column '{arm}' have no observed outcome "
                      "and are left out of the fit")
    if len(arms) < 2:
        _fail([Problem("mmrm.one_arm", f"column '{arm}' has only the reference arm among observed outcomes",
                       field=arm, expected="at least two arms", got=repr(arms))])
    groups = tuple(_scalar(g) for g in _levels(observed[covariance_by])) if covariance_by else (None,)
    times = _visit_times(visits, visit_times)

    subject_codes, subject_labels = pd.factorize(observed[subject], sort=True)
    all_subjects = pd.unique(frame[subject].dropna())
    excluded = tuple(sorted(set(all_subjects) - set(subject_labels), key=str))
    visit_index = pd.Categorical(observed[visit], categories=list(visits)).codes.astype(np.int64)
    arm_index = pd.Categorical(observed[arm], categories=list(arms)).codes.astype(np.int64)
    group_index = (pd.Categorical(observed[covariance_by], categories=list(groups)).codes.astype(np.int64)
                   if covariance_by else np.zeros(len(observed), np.int64))

    coder = _CovariateCoder(observed, main_effects, covariates_by_visit)
    covariate_block = coder.encode(observed)
    x = _design_rows(arm_index, visit_index, covariate_block, coder.by_visit_mask, len(arms), len(visits))
    names, keys, blocks, covariate_columns = _term_names(arms, visits, coder)
    _check_cells(arm_index, visit_index, arms, visits, arm)

    patterns = _patterns(subject_codes, visit_index, group_index, x, observed[outcome].to_numpy(float), len(visits))
    _check_rank(sum(np.einsum("jjab->ab", pattern.t_xx) for pattern in patterns), x, names)
    pair_counts = np.zeros((len(groups), len(visits), len(visits)))
    for pattern in patterns:
        pair_counts[pattern.group][np.ix_(pattern.visits, pattern.visits)] += pattern.n
    participant_level = np.ones(x.shape[1], bool)
    for pattern in patterns:
        participant_level &= np.all(np.ptp(pattern.x, axis=1) == 0, axis=0)

    first = _first_row_per_participant(subject_codes, visit_index)
    summary_values, summary = coder.summary(observed.iloc[first])
    cell_means = np.stack([
        _design_rows(np.full(len(visits), a), np.arange(len(visits)),
                     np.repeat(summary_values[None], len(visits), 0), coder.by_visit_mask, len(arms), len(visits))
        for a in range(len(arms))])
    return Design(visits=visits, arms=arms, groups=groups, visit_times=times, term_names=names,
                  term_keys=keys, term_blocks=blocks, covariate_columns=covariate_columns, participant_level=participant_level,
                  patterns=patterns, subject_labels=np.asarray(subject_labels), n_obs=len(observed),
                  n_subjects=len(subject_labels), excluded_subjects=excluded, cell_means=cell_means,
                  covariate_summary=summary, pair_counts=pair_counts)


def _visit_times(visits: tuple, visit_times: Mapping | None) -> np.ndarray:
    if visit_times is None:
        return np.arange(1.0, len(visits) + 1)
    missing = [v for v in visits if v not in visit_times]
    problems = []
    if missing:
        problems.append(Problem("mmrm.visit_time_missing", "visit_times has no time for visit(s) "
                                + ", ".join(map(str, missing)), field="visit_times"))
    else:
        times = np.array([float(visit_times[v]) for v in visits])
        if not np.all(np.isfinite(times)) or len(np.unique(times)) != len(times):
            problems.append(Problem("mmrm.visit_times_not_distinct", "visit_times must be finite and distinct",
                                    field="visit_times", got=repr(dict(zip(visits, times)))))
    _fail(problems)
    return times


class _CovariateCoder:
    """Numeric covariates enter as they are; categorical ones as indicators of every level but the first."""

    def __init__(self, observed: pd.DataFrame, main_effects: tuple, by_visit: tuple):
        self.columns: list[tuple[str, Any]] = []   # (covariate, level or None)
        self.levels: dict[str, list] = {}
        for name in main_effects:
            series = observed[name]
            if _is_categorical(series):
                self.levels[name] = _levels(series)
                self.columns += [(name, level) for level in self.levels[name][1:]]
            else:
                self.columns.append((name, None))
        self.by_visit_mask = np.array([name in by_visit for name, _ in self.columns], bool)

    def encode(self, frame: pd.DataFrame) -> np.ndarray:
        block = np.empty((len(frame), len(self.columns)))
        for j, (name, level) in enumerate(self.columns):
            series = frame[name]
            block[:, j] = series.to_numpy(float) if level is None else (series == level).to_numpy(float)
        return block

    def summary(self, participants: pd.DataFrame) -> tuple[np.ndarray, dict[str, Any]]:
        """Covariate values for the marginal means: means and observed level proportions."""
        values = self.encode(participants).mean(axis=0) if len(self.columns) else np.zeros(0)
        summary: dict[str, Any] = {}
        for name in dict.fromkeys(n for n, _ in self.columns):
            if name in self.levels:
                shares = participants[name].value_counts(normalize=True)
                summary[name] = {"kind": "categorical",
                                 "proportions": {str(level): float(shares.get(level, 0.0)) for level in self.levels[name]}}
            else:
                summary[name] = {"kind": "numeric", "mean": float(participants[name].astype(float).mean())}
        return values, summary


def _design_rows(arm_index, visit_index, covariate_block, by_visit_mask, n_arms, n_visits) -> np.ndarray:
    n = len(arm_index)
    arm_dummies = np.eye(n_arms)[arm_index][:, 1:]
    visit_dummies = np.eye(n_visits)[visit_index][:, 1:]
    interaction = (arm_dummies[:, :, None] * visit_dummies[:, None, :]).reshape(n, -1)
    by_visit = covariate_block[:, by_visit_mask]
    covariate_by_visit = (by_visit[:, :, None] * visit_dummies[:, None, :]).reshape(n, -1)
    return np.hstack([np.ones((n, 1)), arm_dummies, visit_dummies, interaction, covariate_block, covariate_by_visit])


def _term_names(arms, visits, coder: _CovariateCoder):
    """Each column of X in plain words, with a machine-readable key beside it.

    The columns are treatment-coded against the reference arm and the first visit, so each label
    says what its coefficient compares: an arm column is the difference at the first visit, an
    arm-by-visit column "A vs R, V minus V1" the difference at visit V minus the difference at the
    first visit V1 (and likewise for a covariate's effect at each visit)."""
    reference, first = arms[0], visits[0]
    names: list[str] = [f"Intercept ({reference} at {first})"]
    keys: list[dict[str, Any]] = [{"effect": "intercept"}]
    blocks: dict[str, list[int]] = {}

    def add(term, entries):
        blocks.setdefault(term, []).extend(range(len(names), len(names) + len(entries)))
        for label, key in entries:
            names.append(label)
            keys.append({"effect": term, **key})

    add("arm", [(f"{a} vs {reference} at {first}", {"arm": a}) for a in arms[1:]])
    add("visit", [(f"{v} vs {first} in {reference}", {"visit": v}) for v in visits[1:]])
    add("arm_by_visit", [(f"{a} vs {reference}, {v} minus {first}", {"arm": a, "visit": v})
                         for a in arms[1:] for v in visits[1:]])
    described = [(name, _covariate_words(coder, name, level),
                  {"covariate": name} if level is None else {"covariate": name, "level": _scalar(level)}, by)
                 for (name, level), by in zip(coder.columns, coder.by_visit_mask)]
    for name, words, key, by in described:
        add(name, [(words + (f" at {first}" if by else ""), key)])
    for name, words, key, by in described:
        if by:
            add(f"{name}_by_visit", [(f"{words}, {v} minus {first}", {**key, "visit": v}) for v in visits[1:]])
    covariate_columns = {name: blocks[name] for name, _ in coder.columns}
    return tuple(names), tuple(keys), {k: v for k, v in blocks.items() if v}, covariate_columns


def _covariate_words(coder: _CovariateCoder, name: str, level: Any) -> str:
    """A numeric covariate's slope, or a categorical level against the first level."""
    return f"{name} (per unit)" if level is None else f"{name}: {level} vs {coder.levels[name][0]}"


def _check_cells(arm_index, visit_index, arms, visits, arm_column) -> None:
    counts = np.zeros((len(arms), len(visits)), int)
    np.add.at(counts, (arm_index, visit_index), 1)
    empty = np.argwhere(counts == 0)
    if len(empty):
        cells = ", ".join(f"arm {arms[a]!r} at visit {visits[v]!r}" for a, v in empty[:5])
        _fail([Problem("mmrm.empty_cell", f"no observed outcome for {cells}: the arm-by-visit effect "
                       "cannot be estimated", field=arm_column,
                       hint="drop the visit from `visits` or check the data cut")])


def _check_rank(cross_product: np.ndarray, x: np.ndarray, names: tuple[str, ...]) -> None:
    scale = np.sqrt(np.diag(cross_product))
    scale[scale == 0] = 1.0
    cross = cross_product / np.outer(scale, scale)
    eigenvalues = np.linalg.eigvalsh(cross)
    if eigenvalues.min() > 1e-10 * eigenvalues.max():
        return
    from scipy.linalg import qr
    _, r, order = qr(x / scale, mode="economic", pivoting=True)
    diagonal = np.abs(np.diag(r))
    dependent = [names[i] for i, d in zip(order, diagonal) if d <= 1e-7 * diagonal[0]]
    _fail([Problem("mmrm.rank_deficient", "the fixed effects are not all estimable (the design is rank "
                   "deficient); columns that depend on the others: " + ", ".join(dependent),
                   field="covariates", hint="remove a covariate that is constant or duplicates another")])


def _patterns(subject_codes, visit_index, group_index, x, y, n_visits) -> list[Pattern]:
    n_subjects = subject_codes.max() + 1
    masks = np.zeros(n_subjects, np.int64)
    np.add.at(masks, subject_codes, np.left_shift(1, visit_index))
    groups = np.zeros(n_subjects, np.int64)
    groups[subject_codes] = group_index
    row_mask, row_group = masks[subject_codes], groups[subject_codes]
    order = np.lexsort((visit_index, subject_codes, row_mask, row_group))
    x, y = x[order], y[order]
    subject_sorted, key_group, key_mask = subject_codes[order], row_group[order], row_mask[order]
    boundaries = np.flatnonzero(np.diff(key_group * (1 << n_visits) + key_mask)) + 1
    patterns = []
    for start, stop in zip(np.r_[0, boundaries], np.r_[boundaries, len(order)]):
        visits = np.flatnonzero((key_mask[start] >> np.arange(n_visits)) & 1)
        s = len(visits)
        patterns.append(Pattern(group=int(key_group[start]), visits=visits,
                                subjects=subject_sorted[start:stop:s].copy(),
                                x=x[start:stop].reshape(-1, s, x.shape[1]), y=y[start:stop].reshape(-1, s)))
    return patterns


def _first_row_per_participant(subject_codes, visit_index) -> np.ndarray:
    order = np.lexsort((visit_index, subject_codes))
    keep = np.r_[True, np.diff(subject_codes[order]) != 0]
    return order[keep]
