"""Mixed model for repeated measures: generalised least squares with a within-participant
covariance structure over the planned visits, fitted by REML (default) or ML.

``fit_mmrm`` checks its arguments and the data once (:mod:`trialcut.stats.mmrm_design`),
maximises the likelihood for each covariance structure in turn until one converges
(:mod:`trialcut.stats.mmrm_likelihood`), computes every table eagerly
(:mod:`trialcut.stats.mmrm_inference`) and returns a frozen :class:`MMRMFit` that keeps no
reference to the data.

Conventions (also stated in shared/DESIGN.md):

* ``loglik`` carries the full constant (ML: sum of the participants' multivariate normal
  log-densities; REML: -1/2[(n-p) log 2pi + sum log|Sigma_i| + log|X'V^-1X| + r'V^-1 r]).
* AIC = -2 loglik + 2 d and BIC = -2 loglik + d log(n_subjects), where d is the number of
  covariance parameters for REML and covariance parameters plus fixed effects for ML.
* Marginal means set numeric covariates to their mean over the participants in the fit (each
  counted once, at their first analysed visit) and categorical covariates to their observed
  proportions over the same participants.
* Joint tests: ``arm`` tests the arm means averaged over visits (equal weights); ``visit`` the
  visit means averaged over arms; ``arm_by_visit`` the interaction contrasts; a covariate its
  effect averaged over visits (equal weights) and ``<column>_by_visit`` its visit-specific
  departures from the first visit.
* ``covariance_matrix()`` and ``correlation_matrix()`` return one DataFrame (visits x visits);
  with ``covariance_by`` a dict from each group's value to its DataFrame.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, fields
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from trialcut.errors import ConvergenceError, FitError, ModelSpecificationError, Problem
from trialcut.stats.blas_threads import one_blas_thread
from trialcut.stats.covariance import STRUCTURES, make_structure
from trialcut.stats.mmrm_design import Design, build_design
from trialcut.stats.mmrm_inference import Inference
from trialcut.stats.mmrm_likelihood import Likelihood, Maximum, maximise
from trialcut.stats.names import DF_METHODS, ESTIMATION_METHODS

FIXED_EFFECT_COLUMNS = ("term", "estimate", "se", "df", "t", "p")
MEAN_COLUMNS = ("arm", "visit", "estimate", "se", "df", "lower", "upper")
DIFFERENCE_COLUMNS = ("arm", "reference", "visit", "estimate", "se", "df", "t", "p", "lower", "upper")
JOINT_COLUMNS = ("term", "num_df", "den_df", "F", "p")
# Kenward-Roger's second-derivative term corrected for the bias of the estimated
# variances and correlations (Kenward & Roger 2009; see trialcut.stats.mmrm_inference).
BIAS_CORRECTED = "bias_corrected"
RESIDUAL_COLUMNS = ("subject", "visit", "fitted", "residual", "scaled_residual")


# =========================================================================== result
ARRAY_FIELDS = ("coefficients", "coefficient_covariance", "model_based_covariance", "covariance_parameters",
                "covariance_parameter_covariance", "covariance_matrices", "fixed_effect_rows")


@dataclass(frozen=True, eq=False)
class MMRMFit:
    """A fitted repeated-measures model: plain data, frozen (arrays read-only), JSON-able
    through ``to_dict`` and rebuilt by ``from_dict``.  Compare two fits by their ``to_dict()``."""

    settings: dict                  # the arguments of the fit, as given
    structure: str                  # the covariance structure used
    method: str
    df_method: str
    second_derivatives: bool | str  # Kenward-Roger's second-derivative term: True, False or "bias_corrected"
    kenward_roger_parametrisation: tuple   # per covariance group: how the adjustment was computed
    robust: bool
    converged: bool
    iterations: int
    gradient_norm: float            # max |dl/dtheta| at the estimate
    scaled_gradient: float          # g' I^-1 g / 2 at the estimate (the convergence criterion)
    tolerance: float
    loglik: float
    aic: float
    bic: float
    n_subjects: int
    n_subjects_excluded: int        # participants with no observed outcome
    excluded_subjects: tuple
    n_obs: int
    visits: tuple
    arms: tuple                     # reference first
    groups: tuple                   # covariance groups; (None,) without covariance_by
    covariate_summary: dict
    attempts: tuple                 # one dict per structure tried
    warnings: tuple
    term_names: tuple               # each fixed effect in plain words
    term_keys: tuple                # each fixed effect as data: effect (joint-test term), arm, visit, covariate, level
    coefficients: np.ndarray
    coefficient_covariance: np.ndarray   # the variance used for inference (Phi_A, Phi or sandwich)
    model_based_covariance: np.ndarray   # Phi = (X'V^-1X)^-1
    covariance_parameter_names: tuple
    covariance_parameters: np.ndarray    # theta, in the structure's parametrisation
    covariance_parameter_covariance: np.ndarray   # W, inverse expected information of theta
    covariance_matrices: np.ndarray      # (groups, k, k)
    fixed_effect_rows: np.ndarray        # (estimate, se, df) per term
    mean_rows: tuple                # (arm, visit, estimate, se, df)
    difference_rows: tuple          # (arm, reference, visit, estimate, se, df)
    joint_rows: tuple               # (term, num_df, den_df, F, p)
    residual_columns: dict          # subject, visit, fitted, residual, scaled_residual -> read-only arrays

    # ----------------------------------------------------------------- tables
    @property
    def fixed_effects(self) -> pd.DataFrame:
        rows = []
        for term, (estimate, se, df) in zip(self.term_names, self.fixed_effect_rows.tolist()):
            rows.append((term, estimate, se, df, *_t_test(estimate, se, df)))
        return pd.DataFrame(rows, columns=list(FIXED_EFFECT_COLUMNS))

    def marginal_means(self, confidence_level: float = 0.95) -> pd.DataFrame:
        rows = [(arm, visit, est, se, df, *_interval(est, se, df, confidence_level))
                for arm, visit, est, se, df in self.mean_rows]
        return pd.DataFrame(rows, columns=list(MEAN_COLUMNS))

    def differences(self, confidence_level: float = 0.95) -> pd.DataFrame:
        rows = [(arm, ref, visit, est, se, df, *_t_test(est, se, df), *_interval(est, se, df, confidence_level))
                for arm, ref, visit, est, se, df in self.difference_rows]
        return pd.DataFrame(rows, columns=list(DIFFERENCE_COLUMNS))

    def joint_tests(self) -> pd.DataFrame:
        return pd.DataFrame(list(self.joint_rows), columns=list(JOINT_COLUMNS))

    def residuals(self) -> pd.DataFrame:
        """Per analysed outcome: fitted value, raw residual and the residual scaled by the inverse
        Cholesky factor of the participant's Sigma_i (independent N(0, 1) under the model)."""
        return pd.DataFrame({name: np.array(self.residual_columns[name]) for name in RESIDUAL_COLUMNS})

    def covariance_matrix(self) -> pd.DataFrame | dict[Any, pd.DataFrame]:
        """Visits x visits; with ``covariance_by``, a dict group -> DataFrame."""
        return self._visit_frames(self.covariance_matrices)

    def correlation_matrix(self) -> pd.DataFrame | dict[Any, pd.DataFrame]:
        sd = np.sqrt(np.einsum("gjj->gj", self.covariance_matrices))
        return self._visit_frames(self.covariance_matrices / (sd[:, :, None] * sd[:, None, :]))

    def _visit_frames(self, matrices: np.ndarray):
        visits = list(self.visits)
        frames = {group: pd.DataFrame(matrix, index=pd.Index(visits, name="visit"), columns=visits)
                  for group, matrix in zip(self.groups, matrices)}
        return frames[None] if self.groups == (None,) else frames

    # ----------------------------------------------------------------- serialisation
    def to_dict(self, confidence_level: float = 0.95) -> dict[str, Any]:
        """Every field (lossless: ``MMRMFit.from_dict`` rebuilds the fit) plus, under ``tables``,
        the tables at ``confidence_level`` for readers.  NaN and infinite numbers become None (an
        infinite df means the normal distribution)."""
        data = {f.name: _plain(getattr(self, f.name)) for f in fields(self)}
        data["tables"] = {
            "fixed_effects": _table(self.fixed_effects),
            "marginal_means": _table(self.marginal_means(confidence_level)),
            "differences": _table(self.differences(confidence_level)),
            "joint_tests": _table(self.joint_tests()),
        }
        for name, frames in (("covariance_matrix", self.covariance_matrix()),
                             ("correlation_matrix", self.correlation_matrix())):
            if isinstance(frames, dict):
                for group, frame in frames.items():
                    data["tables"][f"{name}[{group}]"] = _table(frame.reset_index())
            else:
                data["tables"][name] = _table(frames.reset_index())
        data["confidence_level"] = confidence_level
        return data

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> "MMRMFit":
        values = {}
        for f in fields(cls):
            value = data[f.name]
            if f.name in ARRAY_FIELDS:
                value = _readonly(np.array(_frozen(value), dtype=float))
            elif f.name == "residual_columns":
                value = {name: _readonly(np.array(_frozen(column), dtype=float if name not in ("subject", "visit") else object))
                         for name, column in value.items()}
            elif f.name in ("mean_rows", "difference_rows", "joint_rows"):
                value = _frozen(value)
            elif isinstance(value, list):
                value = tuple(value)
            values[f.name] = value
        return cls(**values)


def _readonly(array: np.ndarray) -> np.ndarray:
    array = np.array(array)
    array.flags.writeable = False
    return array


def _t_test(estimate, se, df):
    if not (se > 0 and df == df):
        return math.nan, math.nan
    t = estimate / se
    return t, float(2 * stats.t.sf(abs(t), df))


def _interval(estimate, se, df, confidence_level):
    if not 0 < confidence_level < 1:
        raise ModelSpecificationError(
            f"confidence_level: expected a number between 0 and 1; got {confidence_level!r}",
            [Problem("mmrm.confidence_level", "confidence_level must lie between 0 and 1",
                     field="confidence_level", expected="a number between 0 and 1", got=repr(confidence_level))])
    if not df == df:
        return math.nan, math.nan
    half = float(stats.t.ppf(0.5 + confidence_level / 2, df)) * se
    return estimate - half, estimate + half


def _plain(value):
    """JSON-able copy: containers to lists and dicts, numpy scalars to Python, NaN/inf to None."""
    if isinstance(value, np.ndarray):
        if value.dtype.kind == "f":
            listed = value.tolist()
            return listed if np.isfinite(value).all() else _plain(listed)
        value = value.tolist()
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _frozen(value):
    if isinstance(value, list):
        return tuple(_frozen(v) for v in value)
    return math.nan if value is None else value


def _table(frame: pd.DataFrame) -> dict[str, Any]:
    return {"columns": [str(c) for c in frame.columns], "data": _plain(frame.to_numpy(dtype=object).tolist())}


# =========================================================================== fitting
def fit_mmrm(data: pd.DataFrame, *, outcome: str = "CHG", subject: str = "USUBJID", visit: str = "AVISIT",
             arm: str = "TRT01P", reference: Any, visits: Sequence | None = None,
             covariates: Sequence[str] = (), covariates_by_visit: Sequence[str] = (),
             covariance: str | Sequence[str] = "unstructured", covariance_by: str | None = None,
             method: str = "reml", df: str = "kenward_roger", second_derivatives: bool | str = True,
             robust: bool = False,
             visit_times: Mapping[Any, float] | None = None, max_iterations: int = 100,
             tolerance: float = 1e-8) -> MMRMFit:
    """Fit the repeated-measures model (see the module docstring and shared/DESIGN.md).

    ``visit_times`` maps each visit to its planned time (used by ``spatial_exponential``;
    default 1..k).  ``tolerance`` bounds g'I^-1 g / 2, the likelihood gain a further scoring step
    could still bring.  Raises ModelSpecificationError for arguments or data that cannot describe
    a model, ConvergenceError (one structure) or FitError (a list) when no structure converges.
    """
    names = _check_arguments(covariance, method, df, second_derivatives, robust, max_iterations, tolerance)
    settings = {"outcome": outcome, "subject": subject, "visit": visit, "arm": arm, "reference": reference,
                "visits": None if visits is None else list(visits), "covariates": list(covariates),
                "covariates_by_visit": list(covariates_by_visit), "covariance": list(names),
                "covariance_by": covariance_by, "method": method, "df": df,
                "second_derivatives": second_derivatives, "robust": robust,
                "visit_times": None if visit_times is None else dict(visit_times),
                "max_iterations": max_iterations, "tolerance": tolerance}
    # One BLAS thread (trialcut.stats.blas_threads): the same numbers on any machine, and a
    # multi-threaded BLAS spends more time waking its threads than on the fit's small products.
    with warnings.catch_warnings(record=True) as caught, one_blas_thread():
        warnings.simplefilter("always")
        design = build_design(data, outcome=outcome, subject=subject, visit=visit, arm=arm, reference=reference,
                              visits=visits, covariates=covariates, covariates_by_visit=covariates_by_visit,
                              covariance_by=covariance_by, visit_times=visit_times)
        name, likelihood, maximum, attempts = _fit_first_converging(design, names, method, max_iterations, tolerance)
        inference = Inference(likelihood, maximum.evaluation, design, df, robust,
                              second_derivatives=second_derivatives is not False and second_derivatives != np.False_,
                              bias_correction=_bias_corrected(second_derivatives))
        fit = _assemble(design, settings, name, likelihood, maximum, inference, attempts, caught)
    return fit


def _bias_corrected(second_derivatives) -> bool:
    return isinstance(second_derivatives, str) and second_derivatives == BIAS_CORRECTED


def _check_arguments(covariance, method, df, second_derivatives, robust, max_iterations,
                     tolerance) -> tuple[str, ...]:
    names = (covariance,) if isinstance(covariance, str) else tuple(covariance)
    problems = []
    if not names:
        problems.append(Problem("mmrm.no_structure", "covariance: give at least one structure", field="covariance"))
    for name in names:
        if name not in STRUCTURES:
            problems.append(Problem("mmrm.unknown_structure", f"covariance: unknown structure {name!r}",
                                    field="covariance", expected="one of " + ", ".join(STRUCTURES), got=repr(name)))
    if method not in ESTIMATION_METHODS:
        problems.append(Problem("mmrm.unknown_method", f"method: unknown estimation method {method!r}",
                                field="method", expected=" or ".join(ESTIMATION_METHODS), got=repr(method)))
    if df not in DF_METHODS:
        problems.append(Problem("mmrm.unknown_df", f"df: unknown degrees-of-freedom method {df!r}",
                                field="df", expected="one of " + ", ".join(DF_METHODS), got=repr(df)))
    elif df == "kenward_roger" and method != "reml":
        problems.append(Problem("mmrm.kenward_roger_needs_reml", f"df {df!r} needs method 'reml'",
                                field="df", got=f"method {method!r}",
                                hint="use method='reml' or df='satterthwaite'"))
    if not (isinstance(second_derivatives, (bool, np.bool_)) or _bias_corrected(second_derivatives)):
        problems.append(Problem("mmrm.second_derivatives_not_bool",
                                f"second_derivatives must be True, False or {BIAS_CORRECTED!r}",
                                field="second_derivatives", got=repr(second_derivatives)))
    if not isinstance(robust, (bool, np.bool_)):
        problems.append(Problem("mmrm.robust_not_bool", "robust must be True or False", field="robust",
                                got=repr(robust)))
    if not (isinstance(max_iterations, int) and max_iterations >= 1):
        problems.append(Problem("mmrm.bad_iterations", "max_iterations must be a positive integer",
                                field="max_iterations", got=repr(max_iterations)))
    if not (isinstance(tolerance, (int, float)) and tolerance > 0):
        problems.append(Problem("mmrm.bad_tolerance", "tolerance must be a positive number", field="tolerance",
                                got=repr(tolerance)))
    if problems:
        raise ModelSpecificationError("; ".join(p.render() for p in problems), problems)
    return names


def _moment_covariances(design: Design) -> list[np.ndarray]:
    """Per group, the pairwise-available covariance of OLS residuals, made positive definite."""
    p, k = design.n_parameters, len(design.visits)
    xtx, xty = np.zeros((p, p)), np.zeros(p)
    for pattern in design.patterns:
        xtx += np.einsum("jjab->ab", pattern.t_xx)
        xty += np.einsum("jja->a", pattern.t_xy)
    beta = np.linalg.solve(xtx, xty)
    sums = np.zeros((len(design.groups), k, k))
    for pattern in design.patterns:
        residual = pattern.y - pattern.x @ beta
        sums[pattern.group][np.ix_(pattern.visits, pattern.visits)] += residual.T @ residual
    moments = []
    for total, counts in zip(sums, design.pair_counts):
        with np.errstate(invalid="ignore", divide="ignore"):
            matrix = np.where(counts > 0, total / np.maximum(counts, 1), 0.0)
        variances = np.diag(matrix).copy()
        fallback = variances[variances > 0].mean() if np.any(variances > 0) else 1.0
        variances[variances <= 0] = fallback
        np.fill_diagonal(matrix, variances)
        values, vectors = np.linalg.eigh(matrix)
        values = np.maximum(values, 1e-3 * values.max())
        moments.append((vectors * values) @ vectors.T)
    return moments


def _fit_first_converging(design: Design, names, method, max_iterations, tolerance):
    moments = _moment_covariances(design)
    k = len(design.visits)
    attempts: list[dict[str, Any]] = []
    only_specification = True
    for name in names:
        structures = [make_structure(name, k, design.visit_times) for _ in design.groups]
        reason = _identifiability(design, structures)
        if reason:
            attempts.append({"structure": name, "status": "rejected", "reason": reason, "stage": "specification"})
            continue
        only_specification = False
        likelihood = Likelihood(design.patterns, structures, reml=(method == "reml"))
        theta0 = np.concatenate([s.start(m) for s, m in zip(structures, moments)])
        try:
            maximum = maximise(likelihood, theta0, max_iterations=max_iterations, tolerance=tolerance)
        except ConvergenceError as error:
            attempts.append({"structure": name, "status": "rejected", "reason": str(error), "stage": "fit"})
            continue
        attempts.append({"structure": name, "status": "used", "reason": None, "stage": "fit",
                         "iterations": maximum.iterations, "loglik": maximum.evaluation.loglik,
                         "gradient_norm": maximum.gradient_norm})
        return name, likelihood, maximum, attempts
    summary = "; ".join(f"{a['structure']}: {a['reason']}" for a in attempts)
    if only_specification:
        raise ModelSpecificationError(
            "too few participants or visits for the covariance structure: " + summary,
            [Problem("mmrm.too_few_participants", a["reason"], field="covariance", got=a["structure"])
             for a in attempts])
    error_class = ConvergenceError if len(names) == 1 else FitError
    raise error_class("no covariance structure converged: " + summary, attempts=attempts)


def _identifiability(design: Design, structures) -> str | None:
    for group, structure, counts in zip(design.groups, structures, design.pair_counts):
        reason = structure.identifiability_problem(counts)
        if reason:
            where = f" (covariance group {group!r})" if group is not None else ""
            return reason + where
    n_theta = sum(s.n_parameters for s in structures)
    spare = design.n_obs - design.n_parameters
    if spare < n_theta:
        return (f"{design.n_obs} observations and {design.n_parameters} fixed effects leave {spare} residual "
                f"degrees of freedom for {n_theta} covariance parameters")
    return None


# =========================================================================== tables
def _assemble(design: Design, settings, name, likelihood: Likelihood, maximum: Maximum,
              inference: Inference, attempts, caught) -> MMRMFit:
    evaluation = maximum.evaluation
    p = design.n_parameters
    fixed = inference.contrasts(np.eye(p))
    cell = design.cell_means.reshape(-1, p)
    means = inference.contrasts(cell)
    labels = [(a, v) for a in design.arms for v in design.visits]
    mean_rows = tuple((a, v, *map(float, values)) for (a, v), values in zip(labels, zip(*means)))
    reference_rows = design.cell_means[0]
    difference_matrix = (design.cell_means[1:] - reference_rows[None]).reshape(-1, p)
    differences = inference.contrasts(difference_matrix)
    difference_labels = [(a, design.arms[0], v) for a in design.arms[1:] for v in design.visits]
    difference_rows = tuple((*lab, *map(float, values)) for lab, values in zip(difference_labels, zip(*differences)))
    joint_rows = tuple((term, *inference.joint(matrix)) for term, matrix in _joint_contrasts(design).items())

    n_theta = likelihood.n_parameters
    counted = n_theta + (p if likelihood.reml is False else 0)
    loglik = evaluation.loglik
    notes = [str(w.message) for w in caught] + inference.notes
    if maximum.message != "converged":
        notes.append(f"{name}: {maximum.message}")
    notes += _non_finite_notes("fixed effects", design.term_names, np.column_stack(fixed))
    notes += _non_finite_notes("marginal means", [f"{a} at {v}" for a, v in labels], np.column_stack(means))
    notes += _non_finite_notes("differences", [f"{a} at {v}" for a, _, v in difference_labels],
                               np.column_stack(differences))
    notes += _lowered_standard_errors(inference, difference_matrix, [f"{a} at {v}" for a, _, v in difference_labels])
    notes += _non_finite_notes("joint tests", [row[0] for row in joint_rows],
                               np.array([row[1:] for row in joint_rows], float).reshape(-1, 4))
    if design.excluded_subjects:
        notes.append(f"{len(design.excluded_subjects)} participant(s) with no observed outcome left out of the fit")
    structures = likelihood.structures
    theta_names = tuple(f"{g}:{n}" if g is not None else n
                        for g, s in zip(design.groups, structures) for n in s.parameter_names([str(v) for v in design.visits]))
    fields_ = dict(
        settings=settings, structure=name, method="reml" if likelihood.reml else "ml", df_method=inference.df_method,
        second_derivatives=(BIAS_CORRECTED if _bias_corrected(settings["second_derivatives"])
                            else bool(settings["second_derivatives"])),
        kenward_roger_parametrisation=_kenward_roger_parametrisation(design, structures, inference),
        robust=bool(inference.robust), converged=maximum.converged, iterations=maximum.iterations,
        gradient_norm=maximum.gradient_norm, scaled_gradient=maximum.decrement, tolerance=settings["tolerance"],
        loglik=loglik, aic=-2 * loglik + 2 * counted, bic=-2 * loglik + counted * math.log(design.n_subjects),
        n_subjects=design.n_subjects, n_subjects_excluded=len(design.excluded_subjects),
        excluded_subjects=design.excluded_subjects, n_obs=design.n_obs, visits=design.visits, arms=design.arms,
        groups=design.groups, covariate_summary=design.covariate_summary, attempts=tuple(attempts),
        warnings=tuple(notes), term_names=design.term_names, term_keys=design.term_keys,
        coefficients=evaluation.beta,
        coefficient_covariance=inference.covariance, model_based_covariance=evaluation.xvx_inverse,
        covariance_parameter_names=theta_names, covariance_parameters=evaluation.theta,
        covariance_parameter_covariance=inference.weights, covariance_matrices=np.array(evaluation.sigmas),
        fixed_effect_rows=np.column_stack(fixed), mean_rows=mean_rows, difference_rows=difference_rows,
        joint_rows=joint_rows, residual_columns=_residual_columns(design, evaluation))
    return MMRMFit(**{key: _readonly(value) if key in ARRAY_FIELDS else value for key, value in fields_.items()})


def _kenward_roger_parametrisation(design: Design, structures, inference: Inference) -> tuple:
    """Per covariance group, which parameters the Kenward-Roger adjustment was computed in and what
    happened to its second-derivative term, in words a report can print (empty for other df methods)."""
    if inference.df_method != "kenward_roger":
        return ()
    records = []
    for group, structure in zip(design.groups, structures):
        linear = structure.linear_entries is not None
        if linear:
            term = "zero"
            sentence = (f"computed in {structure.inference_parameters}, in which the structure "
                        "is linear, so the second-derivative term is zero and the result does not depend on "
                        "the parametrisation")
        elif inference.bias_correction:
            term = "bias corrected"
            sentence = (f"the second-derivative term is taken in {structure.inference_parameters} and corrected "
                        "for the bias of the REML estimates of these parameters (Kenward & Roger 2009), so the "
                        "adjustment does not depend on the parametrisation")
        elif inference.second_derivatives:
            term = "included"
            sentence = (f"the second-derivative term is taken in {structure.inference_parameters}; "
                        "it depends on this choice of parametrisation, and with log standard deviations it can "
                        "make an adjusted standard error smaller than the unadjusted one")
        else:
            term = "left out"
            sentence = ("the second-derivative term is left out, so the adjustment uses first "
                        "derivatives only and does not depend on the parametrisation")
        records.append({"group": group, "structure": structure.name, "linear": linear,
                        "parameters": structure.inference_parameters, "second_derivative_term": term,
                        "description": sentence})
    return tuple(records)


def _lowered_standard_errors(inference: Inference, contrasts: np.ndarray, labels) -> list[str]:
    """Name the contrasts whose Kenward-Roger standard error is below the unadjusted one: a reader
    expects the adjustment to widen intervals, and it narrows them only through the second-derivative
    term of a non-linear structure."""
    if inference.df_method != "kenward_roger" or inference.robust:
        return []
    adjusted = np.einsum("mp,pq,mq->m", contrasts, inference.model_based, contrasts)
    unadjusted = np.einsum("mp,pq,mq->m", contrasts, inference.phi, contrasts)
    lowered = [str(label) for label, a, u in zip(labels, adjusted, unadjusted) if a < u * (1 - 1e-9)]
    if not lowered:
        return []
    return [f"Kenward-Roger: the adjusted standard error is smaller than the unadjusted one for "
            f"{len(lowered)} difference(s) ({', '.join(lowered[:5])}); this comes from the second-derivative "
            "term of a structure that is not linear in its parameters"]


def _non_finite_notes(table: str, labels, values: np.ndarray) -> list[str]:
    """Say why a number is missing or infinite, so that no NaN appears unexplained."""
    notes = []
    infinite = [label for label, row in zip(labels, values) if np.isinf(row).any()]
    missing = [label for label, row in zip(labels, values) if np.isnan(row).any()]
    if infinite:
        notes.append(f"{table}: infinite degrees of freedom for {', '.join(map(str, infinite[:5]))} (the variance "
                     "does not depend on the covariance parameters), so the normal distribution is used; "
                     "to_dict writes them as null")
    if missing:
        notes.append(f"{table}: some values of {', '.join(map(str, missing[:5]))} could not be computed "
                     "(zero or negative variance or degrees of freedom)")
    return notes


def _joint_contrasts(design: Design) -> dict[str, np.ndarray]:
    cells = design.cell_means                    # (arms, visits, p)
    p = design.n_parameters
    tests: dict[str, np.ndarray] = {}
    arm_means = cells.mean(axis=1)
    visit_means = cells.mean(axis=0)
    if len(design.arms) > 1:
        tests["arm"] = arm_means[1:] - arm_means[0]
    if len(design.visits) > 1:
        tests["visit"] = visit_means[1:] - visit_means[0]
        tests["arm_by_visit"] = (cells[1:, 1:] - cells[:1, 1:] - cells[1:, :1] + cells[:1, :1]).reshape(-1, p)
    for term, columns in design.term_blocks.items():
        if term in ("arm", "visit", "arm_by_visit") or term.endswith("_by_visit") and term[:-9] in design.covariate_columns:
            continue
        rows = np.zeros((len(columns), p))
        rows[np.arange(len(columns)), columns] = 1.0
        by_visit = design.term_blocks.get(f"{term}_by_visit")
        if by_visit:             # average the effect over visits (the first visit has no column)
            per_column = len(design.visits) - 1
            for i in range(len(columns)):
                rows[i, by_visit[i * per_column:(i + 1) * per_column]] = 1.0 / len(design.visits)
        tests[term] = rows
    for term, columns in design.term_blocks.items():
        if term.endswith("_by_visit") and term[:-9] in design.covariate_columns:
            rows = np.zeros((len(columns), p))
            rows[np.arange(len(columns)), columns] = 1.0
            tests[term] = rows
    return tests


def _residual_columns(design: Design, evaluation) -> dict[str, np.ndarray]:
    subjects, visits, fitted, raw, scaled = [], [], [], [], []
    for pattern in design.patterns:
        sigma = evaluation.sigmas[pattern.group][np.ix_(pattern.visits, pattern.visits)]
        factor = np.linalg.cholesky(sigma)
        prediction = pattern.x @ evaluation.beta
        residual = pattern.y - prediction
        subjects.append(np.repeat(pattern.subjects, len(pattern.visits)))
        visits.append(np.tile(pattern.visits, pattern.n))
        fitted.append(prediction.ravel())
        raw.append(residual.ravel())
        scaled.append(np.linalg.solve(factor, residual.T).T.ravel())
    subjects, visits = np.concatenate(subjects), np.concatenate(visits)
    order = np.lexsort((visits, subjects))
    columns = {"subject": design.subject_labels[subjects[order]],
               "visit": np.array(design.visits + (None,), dtype=object)[:-1][visits[order]]}
    for name, parts in zip(RESIDUAL_COLUMNS[2:], (fitted, raw, scaled)):
        columns[name] = np.concatenate(parts)[order]
    return {name: _readonly(column) for name, column in columns.items()}
